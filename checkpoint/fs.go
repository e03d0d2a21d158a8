package checkpoint

import (
	"io"
	"io/fs"
	"os"
	"path/filepath"
)

// FS is the file-system seam of the store: the OS by default, and in tests
// a wrapper that injects failures (a full disk, a torn write).
type FS interface {
	MkdirAll(dir string) error            // create with mode 0700
	ReadDir(dir string) ([]string, error) // names in the directory
	ReadFile(path string) ([]byte, error) //
	Open(path string) (OpenFile, error)   // for reading in place (Store.Stream)
	Stat(path string) (fs.FileInfo, error)
	Create(path string) (File, error)     // new file, mode 0600, failing if it exists
	Rename(oldpath, newpath string) error //
	Remove(path string) error             //
	SyncDir(dir string) error             // make renames and removals in dir durable
	// Lock takes an advisory lock without waiting (see OSFS.Lock).
	Lock(path string, exclusive bool) (Locker, error)
}

// OpenFile is a file being read (FS.Open).
type OpenFile interface {
	io.ReaderAt
	io.Seeker
	io.Closer
}

// File is a file being written.
type File interface {
	io.Writer
	Sync() error
	Close() error
}

// OSFS is the operating system's file system.
type OSFS struct{}

var _ FS = OSFS{}

// MkdirAll implements FS.
func (OSFS) MkdirAll(dir string) error { return os.MkdirAll(dir, 0o700) }

// ReadDir implements FS.
func (OSFS) ReadDir(dir string) ([]string, error) {
	ents, err := os.ReadDir(dir)
	if err != nil {
		return nil, err
	}
	names := make([]string, len(ents))
	for i, e := range ents {
		names[i] = e.Name()
	}
	return names, nil
}

// ReadFile implements FS.
func (OSFS) ReadFile(path string) ([]byte, error) { return os.ReadFile(path) }

// Open implements FS.
func (OSFS) Open(path string) (OpenFile, error) { return os.Open(path) }

// Stat implements FS.
func (OSFS) Stat(path string) (fs.FileInfo, error) { return os.Stat(path) }

// Create implements FS.
func (OSFS) Create(path string) (File, error) {
	return os.OpenFile(path, os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o600)
}

// Rename implements FS.
func (OSFS) Rename(oldpath, newpath string) error { return os.Rename(oldpath, newpath) }

// Remove implements FS.
func (OSFS) Remove(path string) error { return os.Remove(path) }

// SyncDir implements FS.
func (OSFS) SyncDir(dir string) error {
	d, err := os.Open(filepath.Clean(dir))
	if err != nil {
		return err
	}
	defer d.Close()
	return d.Sync()
}

// Lock takes an advisory lock on the file at path, creating it empty (mode
// 0600) if missing: exclusive, or shared with other shared holders. It does
// not wait: when another holder prevents it, the error wraps ErrLocked.
// Closing the returned Locker releases the lock; so does the end of the
// process, however it ends (a crashed writer holds nothing).
func (OSFS) Lock(path string, exclusive bool) (Locker, error) { return lockFile(path, exclusive) }

// Locker is a held lock.
type Locker interface {
	// Share turns an exclusive lock into a shared one without letting go.
	Share() error
	Close() error
}
