package server

import (
	"context"
	"fmt"
	"strings"
	"syscall"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// faultyJournal writes through a real journal but can fail one flush after
// a given number of entries, as the journal's Flush contract describes a
// short write: the leading entries are written, the rest dropped, and the
// writer stays usable (the fault injection of SQLite's I/O-error tests,
// at the server's edge of the journal).
type faultyJournal struct {
	journalWriter
	pending []func() error
	// failAfter >= 0 fails the next flush after that many entries with err.
	failAfter int
	err       error
	// failSnapshot, if set, fails every flush of a lone snapshot record.
	failSnapshot error
	lone         bool
}

func (f *faultyJournal) AddSessionPair(in journal.EncodedInput, response []byte, pose *pb.FusedPose) error {
	in.Sample = append([]byte(nil), in.Sample...)
	response = append([]byte(nil), response...)
	f.lone = false
	f.pending = append(f.pending, func() error { return f.journalWriter.AddSessionPair(in, response, pose) })
	return nil
}

func (f *faultyJournal) Add(recs ...*pb.JournalRecord) error {
	f.lone = len(f.pending) == 0
	f.pending = append(f.pending, func() error { return f.journalWriter.Add(recs...) })
	return nil
}

func (f *faultyJournal) flush() (int, error) {
	if f.failSnapshot != nil && f.lone && len(f.pending) == 1 {
		f.pending = nil
		return 0, f.failSnapshot
	}
	f.lone = false
	n := len(f.pending)
	if f.failAfter >= 0 {
		n = min(n, f.failAfter)
	}
	for _, add := range f.pending[:n] {
		if err := add(); err != nil {
			panic(err)
		}
	}
	f.pending = nil
	if _, err := f.journalWriter.flush(); err != nil {
		return 0, err
	}
	if f.failAfter >= 0 {
		f.failAfter = -1
		return n, f.err
	}
	return n, nil
}

// faultyServer is a server whose robots write through faultyJournals.
func faultyServer(t *testing.T, opt Options) (*Server, map[string]*faultyJournal) {
	t.Helper()
	js := map[string]*faultyJournal{}
	opt.wrapJournal = func(j journalWriter) journalWriter {
		f := &faultyJournal{journalWriter: j, failAfter: -1}
		js[fmt.Sprint(len(js))] = f
		return f
	}
	s, err := New(opt)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { s.Close() })
	return s, js
}

func requests(robot, session string, first uint64, samp []*pb.Sample) []*arrivedRequest {
	out := make([]*arrivedRequest, len(samp))
	for i, sm := range samp {
		out[i] = &arrivedRequest{IngestRequest: pb.IngestRequest{Robot: robot, ClientSequence: first + uint64(i), Sample: sm, SessionId: session}}
	}
	return out
}

// take ingests a batch in process and returns the verdicts.
func take(s *Server, batch []*arrivedRequest) []*pb.IngestResponse {
	out := s.ingestBatch(batch)
	resps := make([]*pb.IngestResponse, len(out))
	for k := range out {
		resps[k] = &out[k].IngestResponse
	}
	return resps
}

// robotState returns a robot's state, detail and input count.
func robotState(t *testing.T, s *Server, name string) *pb.Robot {
	t.Helper()
	resp, err := s.GetRobot(context.Background(), &pb.GetRobotRequest{Name: name})
	if err != nil {
		t.Fatal(err)
	}
	return resp.GetRobot()
}

// TestShortWriteVerdicts: a flush that writes only part of a batch (disk
// full) answers the written entries with their real verdicts and the rest
// UNAVAILABLE, not applied; the robot's memory equals its journal; it
// pauses, answers new input UNAVAILABLE, resumes by itself when the journal
// takes writes again, and a resend of the unapplied samples is taken once.
// Retries of the written ones get their original verdicts.
func TestShortWriteVerdicts(t *testing.T) {
	dir := t.TempDir()
	s, js := faultyServer(t, Options{JournalDir: dir})
	samp, cfg := cartRun(3, 3)
	ctx := context.Background()
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	const name, sid = "robots/cart", "4b1d0c57-cart-session"
	take(s, requests(name, sid, 1, samp[:100]))
	f := js["0"]
	f.failAfter, f.err = 3, fmt.Errorf("journal cart.000000.rjl: %w: %w", journal.ErrNoSpace, syscall.ENOSPC)
	out := take(s, requests(name, sid, 101, samp[100:110]))
	for k, o := range out {
		switch {
		case k < 3 && (o.Sequence != uint64(101+k) || o.StatusCode != 0):
			t.Errorf("written entry %d: sequence %d status %d (%s), want sequence %d OK", k, o.Sequence, o.StatusCode, o.Reason, 101+k)
		case k >= 3 && (o.Sequence != 0 || codes.Code(o.StatusCode) != codes.Unavailable || !strings.HasPrefix(o.Reason, "not journaled, not applied: ") || !strings.HasSuffix(o.Reason, "; resend")):
			t.Errorf("unwritten entry %d: sequence %d status %d reason %q, want UNAVAILABLE, not applied", k, o.Sequence, o.StatusCode, o.Reason)
		}
	}
	r := robotState(t, s, name)
	if r.GetState() != pb.RobotState_ROBOT_STATE_PAUSED || r.GetStateDetail() != "journal disk full" || r.GetInputCount() != 103 {
		t.Fatalf("after a short write on a full disk: %v %q, %d inputs; want paused, 103", r.GetState(), r.GetStateDetail(), r.GetInputCount())
	}
	s.SyncJournals()
	if _, seq := offline(t, dir, "cart"); seq != 103 {
		t.Errorf("journal holds %d inputs, want 103", seq)
	}
	// Paused: refused at once, not applied.
	if o := take(s, requests(name, sid, 104, samp[103:104]))[0]; o.Sequence != 0 || codes.Code(o.StatusCode) != codes.Unavailable || !strings.Contains(o.Reason, "paused") {
		t.Errorf("while paused: %+v", o)
	}
	s.probePaused()
	if r := robotState(t, s, name); r.GetState() != pb.RobotState_ROBOT_STATE_SERVING {
		t.Fatalf("after the probe: %v %q", r.GetState(), r.GetStateDetail())
	}
	// The client resends the batch: the written three are answered again,
	// the rest taken now.
	again := take(s, requests(name, sid, 101, samp[100:110]))
	for k, o := range again {
		if k < 3 && !proto.Equal(o, out[k]) {
			t.Errorf("retry of written entry %d: %v, want the original %v", k, o, out[k])
		}
		if k >= 3 && o.Sequence != uint64(101+k) {
			t.Errorf("resent entry %d: sequence %d, want %d", k, o.Sequence, 101+k)
		}
	}
	assertMemoryIsJournal(t, s, dir, "cart", 110)
}

// assertMemoryIsJournal checks that the robot in memory is what an offline
// replay of its journal gives.
func assertMemoryIsJournal(t *testing.T, s *Server, dir, id string, inputs uint64) {
	t.Helper()
	s.SyncJournals()
	want, seq := offline(t, dir, id)
	r, _ := s.lookup(RobotName(id))
	r.mu.Lock()
	got := poseNow(r).GetPose()
	n := r.fr.Sequence()
	r.mu.Unlock()
	if seq != inputs || n != inputs || !proto.Equal(got, want) {
		t.Errorf("memory: %d inputs, pose %v; journal: %d inputs, pose %v; want %d", n, got, seq, want, inputs)
	}
}

// TestWriteFailureQuarantines: a write failure that leaves the writer
// broken (journal.ErrBroken: the segment could not be taken back to its last
// complete entry) answers the unwritten entries UNAVAILABLE and quarantines
// the robot (FAILED_PRECONDITION from then on, naming the problem); memory
// still equals the journal.
func TestWriteFailureQuarantines(t *testing.T) {
	dir := t.TempDir()
	s, js := faultyServer(t, Options{JournalDir: dir})
	samp, cfg := cartRun(4, 2)
	ctx := context.Background()
	s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	take(s, requests("robots/cart", "", 1, samp[:50]))
	js["0"].failAfter, js["0"].err = 0, fmt.Errorf("journal cart.000000.rjl: %w: %w", journal.ErrBroken, syscall.EIO)
	for _, o := range take(s, requests("robots/cart", "", 51, samp[50:60])) {
		if o.Sequence != 0 || codes.Code(o.StatusCode) != codes.Unavailable {
			t.Fatalf("unwritten: %v", o)
		}
	}
	assertMemoryIsJournal(t, s, dir, "cart", 50)
	r := robotState(t, s, "robots/cart")
	if r.GetState() != pb.RobotState_ROBOT_STATE_QUARANTINED || !strings.Contains(r.GetStateDetail(), "input/output error") {
		t.Errorf("after EIO: %v %q", r.GetState(), r.GetStateDetail())
	}
	o := take(s, requests("robots/cart", "", 61, samp[60:61]))[0]
	if codes.Code(o.StatusCode) != codes.FailedPrecondition || !strings.Contains(o.Reason, "quarantined") {
		t.Errorf("input to a quarantined robot: %v", o)
	}
	if _, err := s.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart"}); codeOf(err) != codes.FailedPrecondition {
		t.Errorf("GetPoseAt of a quarantined robot: %v", err)
	}
	// Deleted, it sets its broken journal aside as it is; the name serves
	// again.
	deleteSetsAside(t, s, dir, "cart", 50)
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	if o := take(s, requests("robots/cart", "", 1, samp[:1]))[0]; o.Sequence != 1 {
		t.Errorf("the new robot of the name: %v", o)
	}
}

// TestDeletePaused: a robot paused on a full disk is deleted although its
// journal cannot take the closing record: its journal is set aside without
// it (every input journaled before is kept), so that the robot does not
// come back at the next restart.
func TestDeletePaused(t *testing.T) {
	dir := t.TempDir()
	s, js := faultyServer(t, Options{JournalDir: dir, SnapshotEvery: 20})
	samp, cfg := cartRun(5, 2)
	ctx := context.Background()
	s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	take(s, requests("robots/cart", "", 1, samp[:10]))
	js["0"].failSnapshot = fmt.Errorf("journal cart.000000.rjl: %w: %w", journal.ErrNoSpace, syscall.ENOSPC)
	take(s, requests("robots/cart", "", 11, samp[10:20]))
	if r := robotState(t, s, "robots/cart"); r.GetState() != pb.RobotState_ROBOT_STATE_PAUSED {
		t.Fatalf("after a failed snapshot on a full disk: %v", r.GetState())
	}
	s.SyncJournals()
	deleteSetsAside(t, s, dir, "cart", 20)
	// A restart restores the robots that have journals: none.
	if ids, err := journal.Robots(dir); err != nil || len(ids) != 0 {
		t.Errorf("journals left to restore: %v %v", ids, err)
	}
}

// TestSnapshotFailureKeepsVerdicts: a snapshot that fails after the
// inputs were written (here on a full disk) changes none of their verdicts;
// the robot pauses and, once the disk takes writes again, snapshots and
// serves.
func TestSnapshotFailureKeepsVerdicts(t *testing.T) {
	dir := t.TempDir()
	s, js := faultyServer(t, Options{JournalDir: dir, SnapshotEvery: 20})
	samp, cfg := cartRun(5, 2)
	s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	take(s, requests("robots/cart", "", 1, samp[:10]))
	js["0"].failSnapshot = fmt.Errorf("journal cart.000000.rjl: %w: %w", journal.ErrNoSpace, syscall.ENOSPC)
	out := take(s, requests("robots/cart", "", 11, samp[10:20]))
	for k, o := range out {
		if o.Sequence != uint64(11+k) || o.StatusCode != 0 {
			t.Errorf("input %d written before the failed snapshot: %v", 11+k, o)
		}
	}
	if r := robotState(t, s, "robots/cart"); r.GetState() != pb.RobotState_ROBOT_STATE_PAUSED || r.GetInputCount() != 20 {
		t.Errorf("after a failed snapshot on a full disk: %v, %d inputs", r.GetState(), r.GetInputCount())
	}
	assertMemoryIsJournal(t, s, dir, "cart", 20)
	js["0"].failSnapshot = nil
	s.probePaused()
	if r := robotState(t, s, "robots/cart"); r.GetState() != pb.RobotState_ROBOT_STATE_SERVING {
		t.Errorf("after the probe: %v", r.GetState())
	}
	s.SyncJournals()
	_, scan, err := journal.Replay(dir, "cart", journal.ReplayOptions{FromSnapshot: true})
	if err != nil || scan.SnapshotSequence != 20 {
		t.Errorf("the probe's snapshot: at %d (%v), want 20", scan.SnapshotSequence, err)
	}
}

func codeOf(err error) codes.Code { return status.Code(err) }
