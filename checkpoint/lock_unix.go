//go:build unix

package checkpoint

import (
	"errors"
	"fmt"
	"os"
	"syscall"
)

type flockFile struct{ f *os.File }

func lockFile(path string, exclusive bool) (Locker, error) {
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o600)
	if err != nil {
		return nil, err
	}
	how := syscall.LOCK_SH
	if exclusive {
		how = syscall.LOCK_EX
	}
	if err := syscall.Flock(int(f.Fd()), how|syscall.LOCK_NB); err != nil {
		f.Close()
		if errors.Is(err, syscall.EWOULDBLOCK) {
			return nil, fmt.Errorf("%w: %s", ErrLocked, path)
		}
		return nil, err
	}
	return flockFile{f}, nil
}

func (l flockFile) Share() error { return syscall.Flock(int(l.f.Fd()), syscall.LOCK_SH) }

func (l flockFile) Close() error { return l.f.Close() }
