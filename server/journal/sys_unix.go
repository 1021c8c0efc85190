//go:build linux || darwin || freebsd || netbsd || openbsd || dragonfly

package journal

import (
	"errors"
	"os"
	"syscall"
)

// lockFile takes a non-blocking exclusive flock(2) on f. flock locks
// belong to the open file description, so a second open of the same file,
// even in the same process, is refused; the lock goes with the process.
func lockFile(f *os.File) error {
	err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB)
	if errors.Is(err, syscall.EWOULDBLOCK) {
		return ErrLockHeld
	}
	return err
}

// isNoSpace reports whether err says the disk or the quota is full.
func isNoSpace(err error) bool {
	return errors.Is(err, syscall.ENOSPC) || errors.Is(err, syscall.EDQUOT)
}
