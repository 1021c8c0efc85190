//go:build !(linux || darwin || freebsd || netbsd || openbsd || dragonfly)

package journal

import (
	"errors"
	"os"
	"syscall"
)

// lockFile does nothing where flock(2) is not available: the journal
// directory is then not protected against a second daemon.
func lockFile(f *os.File) error { return nil }

// isNoSpace reports whether err says the disk is full.
func isNoSpace(err error) bool { return errors.Is(err, syscall.ENOSPC) }
