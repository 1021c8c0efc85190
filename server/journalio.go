package server

import (
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"syscall"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// This file is the server's one contact with the journal writer's failure
// contract (DEVELOPERS.md, "Design: Journal format"): how many entries a
// flush wrote, what "disk full" and "broken for good" look like, the
// directory lock and the periodic fsync. The rest of the server sees only
// journalWriter and the helpers below. At merge with the journal's
// contract: osJournal.flush calls Flush, errNoSpace is journal.ErrNoSpace,
// isBroken tests journal.ErrBroken, lockJournalDir calls journal.Lock, and
// Options.FS is passed to journal.Options and ReplayOptions.

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

// osJournal is a journal.Writer counting its entries.
type osJournal struct {
	*journal.Writer
	pending int
}

func (j *osJournal) AddSessionPair(in journal.EncodedInput, response []byte, pose *pb.FusedPose) error {
	err := j.Writer.AddSessionPair(in, response, pose)
	if err == nil {
		j.pending++
	}
	return err
}

func (j *osJournal) Add(recs ...*pb.JournalRecord) error {
	err := j.Writer.Add(recs...)
	if err == nil {
		j.pending++
	}
	return err
}

// flush adapts Writer.Flush, which writes all the entries or reports an
// error, to the contract's count of complete entries. Today's Flush leaves
// the bytes of a failed write in the segment, so any failure is taken as
// breaking the writer except a full disk (isBroken); with the contract's
// Flush (complete int, err error), which takes the segment back to its last
// complete entry, this becomes a plain call.
func (j *osJournal) flush() (int, error) {
	n := j.pending
	j.pending = 0
	if err := j.Writer.Flush(); err != nil {
		return 0, err
	}
	return n, nil
}

// errNoSpace is what a flush on a full disk wraps. The journal's own
// sentinel (journal.ErrNoSpace under the contract) takes its place.
var errNoSpace = syscall.ENOSPC

// isNoSpace tells whether a journal error means the disk is full (ENOSPC,
// or EDQUOT for a quota).
func isNoSpace(err error) bool {
	return errors.Is(err, errNoSpace) || errors.Is(err, syscall.EDQUOT)
}

// isBroken tells whether a journal error leaves the writer unusable (the
// contract's journal.ErrBroken: the segment could not be taken back to its
// last complete entry). Any error other than a full disk is taken so until
// then, which quarantines the robot rather than write after a torn entry.
func isBroken(err error) bool { return err != nil && !isNoSpace(err) }

// lockJournalDir takes an exclusive advisory lock (flock) on the file LOCK
// in the journal directory, which holds the holder's pid, so that a second
// daemon on the same directory refuses to start instead of writing over
// the first one's records. The journal package's journal.Lock takes its
// place at merge.
func lockJournalDir(dir string) (unlock func() error, err error) {
	path := filepath.Join(dir, "LOCK")
	f, err := os.OpenFile(path, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		return nil, fmt.Errorf("journal lock: %w", err)
	}
	if err := syscall.Flock(int(f.Fd()), syscall.LOCK_EX|syscall.LOCK_NB); err != nil {
		b, _ := io.ReadAll(io.LimitReader(f, 32))
		f.Close()
		return nil, fmt.Errorf("journal directory %s is in use by process %s (%s): %w", dir, strings.TrimSpace(string(b)), path, err)
	}
	if err := f.Truncate(0); err == nil {
		f.WriteAt([]byte(strconv.Itoa(os.Getpid())+"\n"), 0)
	}
	return f.Close, nil
}

// syncLatest fsyncs the robot's newest journal segment through a
// descriptor of its own, so that the periodic fsync does not hold the
// robot's lock: fsync makes the file's written data durable whichever
// descriptor wrote it (POSIX fsync: "all modified data ... of the file"),
// and the writer syncs a segment before it starts the next one. A journal
// without segments (the robot was just deleted) has nothing to sync. With
// the journal's FS interface this opens through the FS.
func syncLatest(dir, id string) error {
	segs, err := journal.Segments(dir, id)
	if err != nil || len(segs) == 0 {
		return err
	}
	f, err := os.Open(segs[len(segs)-1])
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
	return err
}

// openJournal wraps a new or resumed writer.
func openJournal(w *journal.Writer) journalWriter { return &osJournal{Writer: w} }
