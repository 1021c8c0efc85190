package journal

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
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
// unlock releases the lock; the operating system releases it too when the
// process ends. fsys nil is the OS.
func Lock(fsys FS, dir string) (unlock func() error, err error) {
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
	return f.Close, nil
}
