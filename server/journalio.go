package server

import (
	"errors"
	"fmt"
	"os"
	"sync"
	"syscall"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// This file is the server's one contact with the journal writer's failure
// contract (DEVELOPERS.md, "Design: Journal format"): how many entries a
// flush wrote, what "disk full" and "broken for good" look like, and the
// periodic fsync. The rest of the server sees only journalWriter and the
// helpers below.

// journalWriter is what a robot writes its journal through: a
// *journal.Writer (osJournal), or in tests one that injects faults. An
// entry is one AddSessionPair or one Add call.
type journalWriter interface {
	AddSessionPair(in journal.EncodedInput, response []byte, pose *pb.FusedPose) error
	Add(recs ...*pb.JournalRecord) error
	// flush writes the added entries with one write; complete is how many
	// leading entries are fully written. On error the unwritten entries
	// are dropped and the writer stays usable unless the error is broken.
	flush() (complete int, err error)
	Close() error
	Remove() error
	// SyncPoint is journal.Writer.SyncPoint: the segment being written and
	// how many writes went in.
	SyncPoint() (path string, writes uint64)
}

// osJournal is a *journal.Writer as a journalWriter.
type osJournal struct {
	*journal.Writer
}

// flush is Writer.Flush: on an error the segment is taken back to the end
// of its last complete entry and the rest dropped; a failed rotation after
// a good write reports every entry complete with a *journal.RotateError.
func (j *osJournal) flush() (int, error) { return j.Writer.Flush() }

// isNoSpace tells whether a journal error means the disk is full.
func isNoSpace(err error) bool { return errors.Is(err, journal.ErrNoSpace) }

// isNotWritable tells whether a journal error means the journal directory
// may not be written: its permissions (EACCES, EPERM) or a file system
// mounted read-only (EROFS).
func isNotWritable(err error) bool {
	return errors.Is(err, syscall.EACCES) || errors.Is(err, syscall.EPERM) || errors.Is(err, syscall.EROFS)
}

// isOutOfFiles tells whether a journal error means the process (EMFILE) or
// the system (ENFILE) has no file descriptor left.
func isOutOfFiles(err error) bool {
	return errors.Is(err, syscall.EMFILE) || errors.Is(err, syscall.ENFILE)
}

// isBroken tells whether a journal error leaves the writer unusable: the
// segment could not be taken back to its last complete entry, or an fsync
// failed (after a failed fsync the kernel may have dropped written pages,
// so what was acknowledged is no longer known to be on disk).
func isBroken(err error) bool { return errors.Is(err, journal.ErrBroken) }

// syncer is a robot's periodic fsync, done through a descriptor of its
// own so that it does not hold the robot's lock while the disk works:
// fsync makes the file's written data durable whichever descriptor wrote
// it (POSIX fsync: "all modified data ... of the file"), and the writer
// syncs a segment before it starts the next one. It keeps the descriptor
// open while the writer and its segment stay the same and syncs only when the writer
// wrote since the last time, so that an idle robot costs nothing and a busy
// one one fdatasync(2) an interval (journal.Datasync).
type syncer struct {
	mu     sync.Mutex
	f      journal.File
	path   string
	by     journalWriter // the writer whose writes were counted
	writes uint64
}

// sync makes what w wrote up to writes durable; path is w's segment
// (journal.Writer.SyncPoint). A segment that is gone (the robot was just
// deleted) has nothing to sync. A failed fsync wraps journal.ErrBroken.
func (sy *syncer) sync(fsys journal.FS, w journalWriter, path string, writes uint64) error {
	sy.mu.Lock()
	defer sy.mu.Unlock()
	if w == sy.by && path == sy.path && writes == sy.writes {
		return nil
	}
	if w != sy.by || path != sy.path || sy.f == nil {
		// Another writer (a rebuilt robot) may have completed a segment
		// under the same name, a new file: open it again.
		sy.closeLocked()
		if fsys == nil {
			fsys = journal.OS
		}
		f, err := fsys.OpenFile(path, os.O_RDONLY, 0)
		if errors.Is(err, os.ErrNotExist) {
			return nil
		}
		if err != nil {
			return fmt.Errorf("%w: fsync of %s: %v", journal.ErrBroken, path, err)
		}
		sy.f, sy.path = f, path
	}
	if err := journal.Datasync(sy.f); err != nil {
		sy.closeLocked()
		return fmt.Errorf("%w: fsync of %s: %v", journal.ErrBroken, path, err)
	}
	sy.by, sy.writes = w, writes
	return nil
}

// current tells whether what w wrote up to writes is synced already.
func (sy *syncer) current(w journalWriter, path string, writes uint64) bool {
	sy.mu.Lock()
	defer sy.mu.Unlock()
	return w == sy.by && path == sy.path && writes == sy.writes
}

// synced notes that what w wrote up to writes to path is durable (a
// syncfs covered it). The descriptor stays open while the segment is the
// same; for another, the next sync opens it.
func (sy *syncer) synced(w journalWriter, path string, writes uint64) {
	sy.mu.Lock()
	defer sy.mu.Unlock()
	if w != sy.by || path != sy.path {
		sy.closeLocked()
	} else if writes < sy.writes {
		return // a later round got further
	}
	sy.by, sy.path, sy.writes = w, path, writes
}

// close closes the descriptor; the next sync opens the segment again.
func (sy *syncer) close() {
	sy.mu.Lock()
	sy.closeLocked()
	sy.mu.Unlock()
}

func (sy *syncer) closeLocked() {
	if sy.f != nil {
		sy.f.Close()
	}
	sy.f, sy.path, sy.by, sy.writes = nil, "", nil, 0
}

// openJournal wraps a new or resumed writer.
func openJournal(w *journal.Writer) journalWriter { return &osJournal{Writer: w} }
