package server

import (
	"errors"
	"fmt"
	"os"

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

// isBroken tells whether a journal error leaves the writer unusable: the
// segment could not be taken back to its last complete entry, or an fsync
// failed (after a failed fsync the kernel may have dropped written pages,
// so what was acknowledged is no longer known to be on disk).
func isBroken(err error) bool { return errors.Is(err, journal.ErrBroken) }

// syncLatest fsyncs the robot's newest journal segment through a
// descriptor of its own, so that the periodic fsync does not hold the
// robot's lock: fsync makes the file's written data durable whichever
// descriptor wrote it (POSIX fsync: "all modified data ... of the file"),
// and the writer syncs a segment before it starts the next one. A journal
// without segments (the robot was just deleted) has nothing to sync. A
// failed fsync wraps journal.ErrBroken.
func syncLatest(fsys journal.FS, dir, id string) error {
	if fsys == nil {
		fsys = journal.OS
	}
	segs, err := journal.SegmentsFS(fsys, dir, id)
	if err != nil || len(segs) == 0 {
		return err
	}
	f, err := fsys.OpenFile(segs[len(segs)-1], os.O_RDONLY, 0)
	if errors.Is(err, os.ErrNotExist) {
		return nil
	}
	if err != nil {
		return err
	}
	err = f.Sync()
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return fmt.Errorf("%w: fsync of %s: %v", journal.ErrBroken, segs[len(segs)-1], err)
	}
	return nil
}

// openJournal wraps a new or resumed writer.
func openJournal(w *journal.Writer) journalWriter { return &osJournal{Writer: w} }
