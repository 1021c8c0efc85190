package journal

import (
	"errors"
	"fmt"
)

// ErrNoSpace is wrapped by the errors of writes that failed because the
// disk or the user's quota is full (ENOSPC, EDQUOT): the writer stays
// usable and a later Flush may succeed once space returns.
var ErrNoSpace = errors.New("no space left for the journal")

// ErrBroken is wrapped by the errors of a writer that can no longer tell
// what its segment holds: a failed write whose incomplete entry could not
// be truncated away, or a failed fsync (after which the kernel may have
// dropped the unwritten pages; PostgreSQL's "fsyncgate", 2018). Every later
// call fails with it; the robot must stop and be restored from the journal.
var ErrBroken = errors.New("journal broken")

// ErrGap is wrapped by the errors of a scan that found inputs missing: a
// sequence number that does not follow the one before it, a segment
// missing between two others, or fewer segments than the manifest names.
// The records on both sides of the gap are kept.
var ErrGap = errors.New("journal gap")

// ErrNoJournal is wrapped by the error of a read of a robot that the
// directory holds no journal of.
var ErrNoJournal = errors.New("no journal")

// ErrNoRun is wrapped by the error of a reader of a journal asked for a
// run (a controller restart begins one) that the journal does not hold.
var ErrNoRun = errors.New("no such run")

// ErrLockHeld is wrapped by the error of an FS's Lock when another holder
// has the lock; Lock turns it into a *LockedError.
var ErrLockHeld = errors.New("lock held by another")

// DamageError reports damaged bytes inside a journal: a frame whose length,
// CRC-32C or payload is wrong, followed by valid frames. The damaged range
// [Offset, Offset+Length) of File was copied, untouched, into Kept (by a
// scan that may write; a read-only scan leaves them where they are); the
// scan went on at the next valid frame.
type DamageError struct {
	File   string
	Offset int64 // bytes from the start of File
	Length int64 // bytes
	Reason string
	// Kept is the path of the copy of the damaged bytes; empty when the
	// scan was read only (Visitor.ReadOnly).
	Kept string
}

// Error says where the damage is, how long, why, and where it was kept.
func (e *DamageError) Error() string {
	where := "kept in " + e.Kept
	if e.Kept == "" {
		where = "left in place"
	}
	return fmt.Sprintf("journal damage in %s at byte %d (%d bytes, %s): %s", e.File, e.Offset, e.Length, where, e.Reason)
}

// RotateError reports a rotation (starting the next segment) that failed
// after the entries of a Flush were written: they are in the journal and
// Flush counts them complete. The writer goes on appending to the full
// segment and tries again at the next Flush.
type RotateError struct {
	Segment string // the segment that could not be started
	Err     error
}

// Error names the segment and the cause.
func (e *RotateError) Error() string {
	return fmt.Sprintf("journal rotation to %s failed (the entries written are complete): %v", e.Segment, e.Err)
}

// Unwrap returns the cause.
func (e *RotateError) Unwrap() error { return e.Err }

// noSpaceError marks an ENOSPC or EDQUOT as ErrNoSpace, keeping the cause.
type noSpaceError struct{ err error }

func (e noSpaceError) Error() string   { return e.err.Error() }
func (e noSpaceError) Unwrap() []error { return []error{ErrNoSpace, e.err} }

// classify wraps err with ErrNoSpace when the disk or the quota is full.
func classify(err error) error {
	if isNoSpace(err) {
		return noSpaceError{err}
	}
	return err
}
