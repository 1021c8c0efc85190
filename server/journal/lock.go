package journal

import (
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"
)

// LockName is the name of the lock file in a journal directory.
const LockName = "LOCK"

// LockedError reports a journal directory locked by another process.
type LockedError struct {
	Dir string
	// PID is the holder's process id as its lock file says (0: unknown).
	PID int
}

// Error names the directory and the holder's pid.
func (e *LockedError) Error() string {
	if e.PID == 0 {
		return fmt.Sprintf("journal directory %s is locked by another process (pid unknown)", e.Dir)
	}
	return fmt.Sprintf("journal directory %s is locked by process %d", e.Dir, e.PID)
}

// Lock takes an exclusive advisory lock on the journal directory dir (the
// file dir/LOCK, holding the holder's pid), so that a second daemon on the
// same directory refuses to start instead of appending at the same
// offsets. A second holder gets a *LockedError naming the first one's pid.
// DirLock.Unlock releases the lock; the operating system releases it too
// when the process ends. fsys nil is the OS.
func Lock(fsys FS, dir string) (*DirLock, error) {
	fsys = orOS(fsys)
	name := filepath.Join(dir, LockName)
	f, err := fsys.Lock(name)
	if errors.Is(err, ErrLockHeld) {
		le := &LockedError{Dir: dir}
		if b, rerr := readFile(fsys, name); rerr == nil {
			le.PID, _ = strconv.Atoi(strings.TrimSpace(string(b)))
		}
		return nil, le
	}
	if err != nil {
		return nil, fmt.Errorf("journal lock %s: %w", name, err)
	}
	// The pid is for the message of a second holder; the lock itself is
	// the flock, so a stale pid left by a dead process does no harm.
	if err := f.Truncate(0); err == nil {
		_, err = f.Write([]byte(strconv.Itoa(os.Getpid()) + "\n"))
	}
	if err != nil {
		f.Close()
		return nil, fmt.Errorf("journal lock %s: %w", name, err)
	}
	return &DirLock{fs: fsys, name: name, f: f}, nil
}

// ErrDirGone is wrapped by DirLock.Check's error when the journal
// directory is no longer the one locked: it was removed, renamed, or
// replaced by another directory or a file. Whatever the journals write
// then goes to files that no path reaches (or to none), and a restart
// finds none of it.
var ErrDirGone = errors.New("journal directory gone")

// DirLock is the lock Lock took on a journal directory.
type DirLock struct {
	fs   FS
	name string
	f    File
}

// Unlock releases the lock.
func (l *DirLock) Unlock() error { return l.f.Close() }

// Check tells whether the directory's lock file is still the file this
// lock holds (the same device and inode), which it is while the locked
// directory is where it was: an error wrapping ErrDirGone and naming what
// was found if not. It costs two stat calls.
func (l *DirLock) Check() error {
	held, err := l.f.Stat()
	if err != nil {
		return fmt.Errorf("journal lock %s: %w", l.name, err)
	}
	now, err := l.fs.Stat(l.name)
	switch {
	case errors.Is(err, fs.ErrNotExist):
		return fmt.Errorf("%w: %s is missing (the directory was removed or renamed)", ErrDirGone, l.name)
	case errors.Is(err, syscall.ENOTDIR):
		return fmt.Errorf("%w: %s: the directory's path is not a directory now: %v", ErrDirGone, l.name, err)
	case err != nil:
		// Not known to be gone (EIO, say): the writes will tell.
		return fmt.Errorf("journal lock %s: %w", l.name, err)
	case !sameFile(held, now):
		return fmt.Errorf("%w: %s is another file than the one locked (the directory was replaced)", ErrDirGone, l.name)
	}
	return nil
}

// sameFile tells whether two descriptions are of one file: os.SameFile on
// the OS, and on another FS the same non-nil Sys value (MemFS gives its
// inode).
func sameFile(a, b os.FileInfo) bool {
	if os.SameFile(a, b) {
		return true
	}
	// The OS's Sys values are pointers of their own to each call's result,
	// never equal.
	sa := a.Sys()
	return sa != nil && sa == b.Sys()
}
