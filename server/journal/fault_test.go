package journal_test

import (
	"errors"
	"fmt"
	"strings"
	"syscall"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// The tests here run the journal over file systems that fail or crash, in
// the manner of SQLite's I/O-error and crash tests (every operation failed
// in turn, then the database reopened and checked), LevelDB's
// fault-injection test (a file system that drops what was not synced) and
// pebble's errorfs and crashable MemFS.

const dir = "/j"

var opening = &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}

func input(seq uint64) *pb.JournalInput {
	return &pb.JournalInput{Sequence: seq, Sample: &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: int64(seq), HeadingRad: 0.1}}}}
}

func output(seq uint64) *pb.JournalOutput {
	return &pb.JournalOutput{Response: &pb.IngestResponse{Sequence: seq, Verdict: pb.Verdict_VERDICT_APPLIED}}
}

func snapshot(seq uint64) *pb.JournalRecord {
	return &pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: seq, State: []byte("the robot's state")}}}
}

// outcome is what a workload was told.
type outcome struct {
	created bool
	acked   int     // pairs Flush counted complete: sequences 1 to acked
	durable int     // of those, the ones known synced
	errs    []error // the errors Flush returned
}

// workload creates the cart's journal and writes 36 pairs in batches of
// three, 1 KiB segments; a batch's pairs that Flush does not count
// complete are added again in the next (as the service's robot must keep
// its sequence numbers contiguous). Without SyncEach it syncs every other
// batch. It stops at ErrBroken. progress, if set, sees the outcome so far
// before every batch.
func workload(fsys journal.FS, syncEach bool, o *outcome) {
	w, err := journal.Create(dir, "cart", opening, journal.Options{FS: fsys, SyncEach: syncEach, SegmentBytes: 1024})
	if err != nil {
		o.errs = append(o.errs, err)
		return
	}
	o.created = true
	for batch := 0; batch < 20 && o.acked < 36; batch++ {
		for k := 1; k <= 3; k++ {
			seq := uint64(o.acked + k)
			if err := w.AddPair(input(seq), output(seq)); err != nil {
				panic(err)
			}
		}
		complete, err := w.Flush()
		o.acked += complete
		var re *journal.RotateError
		if syncEach && (err == nil || errors.As(err, &re)) {
			o.durable = o.acked
		}
		if err != nil {
			o.errs = append(o.errs, err)
			if errors.Is(err, journal.ErrBroken) {
				w.Close()
				return
			}
		}
		if !syncEach && batch%2 == 1 && w.Sync() == nil {
			o.durable = o.acked
		}
		if batch%3 == 2 {
			// A snapshot, as the service writes one: added and flushed on
			// its own, so that a restart can start from it.
			if err := w.Add(snapshot(uint64(o.acked))); err != nil {
				panic(err)
			}
			if _, err := w.Flush(); err != nil {
				o.errs = append(o.errs, err)
				if errors.Is(err, journal.ErrBroken) {
					w.Close()
					return
				}
			}
		}
	}
	if w.Close() == nil {
		o.durable = o.acked
	}
}

// restart reads the journal, checks that it holds the pairs 1 to n with
// n at least min (exactly min if exact), resumes it, adds three pairs
// and checks them all again. It returns n.
func restart(t *testing.T, fsys journal.FS, min int, exact bool) int {
	t.Helper()
	n := check(t, fsys, min, exact)
	sc := checkFromSnapshot(t, fsys, n)
	w, err := journal.Resume(dir, "cart", &sc, journal.Options{FS: fsys, SegmentBytes: 1024})
	if err != nil {
		t.Fatalf("resume: %v", err)
	}
	for seq := uint64(n + 1); seq <= uint64(n+3); seq++ {
		if err := w.AddPair(input(seq), output(seq)); err != nil {
			t.Fatal(err)
		}
	}
	if c, err := w.Flush(); c != 3 || err != nil {
		t.Fatalf("flush after resume: %d complete, %v", c, err)
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	names, _ := fsys.List(dir)
	for _, name := range names {
		if strings.HasSuffix(name, ".tmp") {
			t.Errorf("%s left after resume", name)
		}
	}
	check(t, fsys, n+3, true)
	checkFromSnapshot(t, fsys, n+3)
	return n
}

// checkFromSnapshot reads the journal as a restart does, from the last
// snapshot the manifest records (or, when the manifest cannot say, the
// whole of it), and checks that it hands over a snapshot and then the
// pairs after it up to n, in order, once each, without an error and
// without damage; it returns the scan, for Resume, as the service takes
// it.
func checkFromSnapshot(t *testing.T, fsys journal.FS, n int) journal.Scan {
	t.Helper()
	snap, seqs, sc := readChecked(t, fsys, true)
	if int(snap)+len(seqs) != n {
		t.Fatalf("read from the last snapshot (%d): %d pairs after it, want up to %d", snap, len(seqs), n)
	}
	return sc
}

// readChecked reads the journal, from its last snapshot if fromSnapshot,
// and checks that it reads without an error and without damage (a torn
// tail is not damage), that every input is paired with its own output and
// that the inputs follow the snapshot (or start at 1) in order, once each.
// It returns the snapshot's sequence (0: none) and the inputs' after it.
func readChecked(t *testing.T, fsys journal.FS, fromSnapshot bool) (snap uint64, seqs []uint64, sc journal.Scan) {
	t.Helper()
	what := "read"
	v := journal.Visitor{Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		if in.GetSequence() != out.GetResponse().GetSequence() {
			t.Errorf("%s: input %d paired with output %d", what, in.GetSequence(), out.GetResponse().GetSequence())
		}
		seqs = append(seqs, in.GetSequence())
		return nil
	}}
	if fromSnapshot {
		what = "read from the last snapshot"
		v.Snapshot = func(s *pb.JournalSnapshot) error {
			snap, seqs = s.GetSequence(), seqs[:0]
			return nil
		}
	}
	sc, err := journal.ReadFS(fsys, dir, "cart", v)
	if err != nil {
		t.Fatalf("%s: %v", what, err)
	}
	if len(sc.Damage) > 0 {
		t.Errorf("%s: damage in a journal that only met faults and crashes: %v", what, sc.Damage[0])
	}
	for i, s := range seqs {
		if s != snap+uint64(i)+1 {
			t.Fatalf("%s (snapshot %d): pair %d has sequence %d", what, snap, i+1, s)
		}
	}
	return snap, seqs, sc
}

// check reads the journal and checks that it holds the pairs 1 to n, in
// order, once each, n at least min (exactly if exact), without an error
// and without damage (readChecked).
func check(t *testing.T, fsys journal.FS, min int, exact bool) int {
	t.Helper()
	_, seqs, _ := readChecked(t, fsys, false)
	if len(seqs) < min || (exact && len(seqs) != min) {
		t.Fatalf("%d pairs in the journal, want %d (exact %v)", len(seqs), min, exact)
	}
	return len(seqs)
}

// TestFaultEachOperation fails every create, write, sync, truncate,
// rename, directory sync and reservation in turn, once (a transient
// fault) or from then on (a full disk), with ENOSPC and with EIO, failed
// writes (and copies into reserved space) writing half their bytes; then
// it restarts on the file system without faults. It does so on a file
// system that reserves (the journal appends by a copy) and on one that
// does not (by write).
// The journal holds exactly the pairs Flush counted complete, each once;
// a Create that failed left nothing behind; a Flush error says ErrNoSpace
// exactly when the disk was full.
func TestFaultEachOperation(t *testing.T) {
	ops := []faultfs.Op{faultfs.OpCreate, faultfs.OpWrite, faultfs.OpSync, faultfs.OpTruncate, faultfs.OpRename, faultfs.OpSyncDir, faultfs.OpReserve}
	cases := 0
	for _, mode := range modes {
		for _, syncEach := range []bool{false, true} {
			cmem := faultfs.NewMem()
			cmem.Plain = mode.plain
			clean := faultfs.New(cmem, nil)
			clean.MkdirAll(dir, 0o755)
			var o outcome
			workload(clean, syncEach, &o)
			if o.acked != 36 || len(o.errs) > 0 {
				t.Fatalf("without faults: %d acked, %v", o.acked, o.errs)
			}
			for _, op := range ops {
				for _, errno := range []syscall.Errno{syscall.ENOSPC, syscall.EIO} {
					for _, lasting := range []bool{false, true} {
						for n := 0; n < clean.Count(op); n++ {
							name := fmt.Sprintf("%s/syncEach=%v/%v/%v/lasting=%v/%d", mode.name, syncEach, op, errno, lasting, n)
							inject := faultfs.Nth(op, "", n, errno)
							if lasting {
								inject = faultfs.From(op, "", n, errno)
							}
							mem := faultfs.NewMem()
							mem.Plain = mode.plain
							mem.MkdirAll(dir, 0o755)
							ffs := faultfs.New(mem, inject)
							ffs.ShortWrite = true
							var o outcome
							workload(ffs, syncEach, &o)
							cases++
							t.Run(name, func(t *testing.T) {
								for _, err := range o.errs {
									if full := errors.Is(err, journal.ErrNoSpace); full != (errno == syscall.ENOSPC) && !errors.Is(err, journal.ErrBroken) {
										t.Errorf("ErrNoSpace %v for %v: %v", full, errno, err)
									}
								}
								if !o.created {
									if names, _ := mem.List(dir); len(names) > 0 {
										t.Fatalf("a failed Create left %v", names)
									}
									return
								}
								restart(t, mem, o.acked, true)
							})
						}
					}
				}
			}
		}
	}
	t.Logf("%d faults injected", cases)
}

// modes are the two ways the journal appends: a copy into space reserved
// ahead (journal.ReserveFile; a memory map on Linux) and write(2).
var modes = []struct {
	name  string
	plain bool
}{{"copy", false}, {"write", true}}

// TestPowerLossAtEveryOperation takes the state a power loss would leave
// (faultfs.MemFS.Crash: only what was synced) before every operation of
// the workload, with and without SyncEach, and restarts on each: every
// pair acknowledged and synced by then is there, in order, once; a crash
// before Create returned leaves a journal that reads or none at all, and
// a robot of the same name can then be created.
func TestPowerLossAtEveryOperation(t *testing.T) {
	atEveryOperation(t, "crash", (*faultfs.MemFS).Crash, func(o *outcome) int { return o.durable })
}

// TestKillAtEveryOperation takes the state the daemon's SIGKILL would
// leave (faultfs.MemFS.Kill: everything written, synced or not) before
// every operation of the workload, including every copy of a frame's
// payload or header, and restarts on each: every pair acknowledged by then
// is there, in order, once, with no damage and no gap, whatever the kill
// cut short (the kill-and-restart test of storage systems, here at every
// step rather than at random ones as TestSIGKILLSoak does).
func TestKillAtEveryOperation(t *testing.T) {
	atEveryOperation(t, "kill", (*faultfs.MemFS).Kill, func(o *outcome) int { return o.acked })
}

// atEveryOperation runs the workload both ways and with and without
// SyncEach, takes the state stop leaves (a crash or a kill) before every
// operation and at the end, and restarts on each: the pairs kept(outcome)
// counted by then are there, in order, once; a stop before Create
// returned leaves a journal that reads or none at all, and a robot of the
// same name can then be created.
func atEveryOperation(t *testing.T, what string, stop func(*faultfs.MemFS) *faultfs.MemFS, kept func(*outcome) int) {
	for _, mode := range modes {
		for _, syncEach := range []bool{false, true} {
			mem := faultfs.NewMem()
			mem.Plain = mode.plain
			mem.MkdirAll(dir, 0o755)
			type point struct {
				fs   *faultfs.MemFS
				kept int
				what string
			}
			var points []point
			var o outcome
			ffs := faultfs.New(mem, func(op faultfs.Op, path string) error {
				points = append(points, point{stop(mem), kept(&o), fmt.Sprintf("%v %s", op, path)})
				return nil
			})
			workload(ffs, syncEach, &o)
			points = append(points, point{stop(mem), kept(&o), "the end"})
			for i, p := range points {
				t.Run(fmt.Sprintf("%s/syncEach=%v/%d", mode.name, syncEach, i), func(t *testing.T) {
					if _, err := journal.ReadFS(p.fs, dir, "cart", journal.Visitor{}); err != nil && p.kept == 0 {
						if _, err := journal.Create(dir, "cart", opening, journal.Options{FS: p.fs}); err != nil {
							t.Fatalf("%s before %s: no journal (%v), and none can be created: %v", what, p.what, err, err)
						}
						return
					}
					restart(t, p.fs, p.kept, false)
				})
			}
			if o.acked != 36 {
				t.Fatalf("%d acked", o.acked)
			}
		}
	}
}

// TestFaultWorkloadStartsFromSnapshot: the fault tests' workload leaves a
// journal that a restart reads from its last snapshot (checkFromSnapshot
// then checks the way a restart reads, not only the whole read): without
// faults, the read from the snapshot reads fewer bytes than the whole read
// (which it falls back to when the manifest cannot say where to start) and
// hands over the snapshot after the last batch.
func TestFaultWorkloadStartsFromSnapshot(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	ffs := faultfs.New(mem, nil)
	var o outcome
	workload(ffs, false, &o)
	if o.acked != 36 || len(o.errs) > 0 {
		t.Fatalf("without faults: %d acked, %v", o.acked, o.errs)
	}
	before := ffs.BytesRead()
	check(t, ffs, 36, true)
	whole := ffs.BytesRead() - before
	var snap uint64
	if _, err := journal.ReadFS(ffs, dir, "cart", journal.Visitor{Snapshot: func(s *pb.JournalSnapshot) error {
		snap = s.GetSequence()
		return nil
	}, Pair: func(*pb.JournalInput, *pb.JournalOutput) error { return nil }}); err != nil {
		t.Fatal(err)
	}
	fromSnap := ffs.BytesRead() - before - whole
	if snap != 36 || fromSnap >= whole {
		t.Errorf("read from snapshot %d: %d bytes, the whole read %d", snap, fromSnap, whole)
	}
	checkFromSnapshot(t, ffs, 36)
}
