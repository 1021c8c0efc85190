package journal

import (
	"fmt"
	"os"
	"syscall"

	"golang.org/x/sys/unix"
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

// WholeSync makes everything written on one file system durable with one
// syncfs(2): one journal commit and one cache flush for every robot's
// journal, where fdatasync(2) on each file pays one each (on the
// development machine, ext4 on a virtual disk, 10 journals cost 4.3 ms of
// CPU a round by fdatasync and 0.7 ms by syncfs). It also writes what
// other programs left dirty on that file system, so that it is cheapest
// when the journal directory has a file system of its own.
//
// It keeps the directory open from the start: syncfs reports a writeback
// error on the file system once to each descriptor opened before it
// (errseq semantics), so a long-lived descriptor misses none, whoever else
// saw it first. Linux reports them only since 5.8; OpenWholeSync returns
// nil on an older kernel, and on other systems.
type WholeSync struct {
	f *os.File
}

// OpenWholeSync opens dir for syncfs, or returns nil where syncfs does
// not report writeback errors.
func OpenWholeSync(dir string) (*WholeSync, error) {
	var u unix.Utsname
	if err := unix.Uname(&u); err != nil || !syncfsReportsErrors(unix.ByteSliceToString(u.Release[:])) {
		return nil, nil
	}
	f, err := os.Open(dir)
	if err != nil {
		return nil, err
	}
	return &WholeSync{f: f}, nil
}

// syncfsReportsErrors tells whether a Linux kernel of this release (uname
// -r) reports writeback errors from syncfs: since 5.8 (commit 735e4ae5ba28,
// "vfs: track per-sb writeback errors and report them to syncfs").
func syncfsReportsErrors(release string) bool {
	var major, minor int
	if _, err := fmt.Sscanf(release, "%d.%d", &major, &minor); err != nil {
		return false
	}
	return major > 5 || major == 5 && minor >= 8
}

// Sync makes everything written on the file system durable.
func (w *WholeSync) Sync() error {
	rc, err := w.f.SyscallConn()
	if err != nil {
		return err
	}
	var serr error
	if err := rc.Control(func(fd uintptr) {
		for {
			if serr = unix.Syncfs(int(fd)); serr != unix.EINTR {
				return
			}
		}
	}); err != nil {
		return err
	}
	if serr != nil {
		return &os.PathError{Op: "syncfs", Path: w.f.Name(), Err: serr}
	}
	return nil
}

// Close closes the directory.
func (w *WholeSync) Close() error { return w.f.Close() }
