package journal

import (
	"os"
	"syscall"
)

// Datasync makes f's written data durable, and the metadata needed to read
// it back (its size): fdatasync(2) for an operating-system file, which
// leaves out the times that fsync(2) also writes (POSIX fdatasync;
// PostgreSQL's default for its write-ahead log on Linux, common practice),
// and f.Sync otherwise (a test's file system).
func Datasync(f File) error {
	of, ok := f.(*os.File)
	if !ok {
		return f.Sync()
	}
	rc, err := of.SyscallConn()
	if err != nil {
		return err
	}
	var serr error
	if err := rc.Control(func(fd uintptr) {
		for {
			serr = syscall.Fdatasync(int(fd))
			if serr != syscall.EINTR {
				return
			}
		}
	}); err != nil {
		return err
	}
	if serr != nil {
		return &os.PathError{Op: "fdatasync", Path: of.Name(), Err: serr}
	}
	return nil
}
