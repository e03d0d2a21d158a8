//go:build !unix

package checkpoint

import "os"

// Without flock, a lock is only the file: writers then never clean up
// temporary files they did not create (see OpenStore).
type noLock struct{}

func lockFile(path string, exclusive bool) (Locker, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o600)
	if err != nil {
		return nil, err
	}
	f.Close()
	if exclusive {
		return nil, ErrLocked
	}
	return noLock{}, nil
}

func (noLock) Share() error { return nil }
func (noLock) Close() error { return nil }
