package server

import (
	"context"
	"fmt"
	"runtime"
	"testing"
	"time"
	"weak"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// splitRun is a cart run cut for two clients: the odometry bridge's motion
// up to cutNs and after it, and the camera's fixes stamped within a second
// either side of cutNs, those past it to be held (no odometry covers them
// yet when they come; the robot holds a sample up to 1 s ahead).
func splitRun(seed uint64) (before, after, fixes []*pb.Sample, cfg *pb.RobotConfig) {
	const cutNs = 5e9
	samp, cfg := cartRun(seed, 10)
	for _, s := range samp {
		switch st := convert.SampleStamp(s); {
		case s.GetFix() != nil:
			if st > cutNs-1e9 && st < cutNs+0.95e9 {
				fixes = append(fixes, s)
			}
		case st <= cutNs:
			before = append(before, s)
		default:
			after = append(after, s)
		}
	}
	return before, after, fixes, cfg
}

// cameraHeld is a robot fed by an odometry bridge and a camera on two
// streams, the camera's fixes held (heldCamera).
type cameraHeld struct {
	odo, cam             *feed
	before, after, fixes []*pb.Sample
	cfg                  *pb.RobotConfig
	odoResps             []*pb.IngestResponse // the bridge's verdicts
	held                 map[uint64]uint64    // the camera's held fixes (heldFixes)
}

// heldCamera creates robots/cart on api from splitRun(seed), opens the
// bridge's stream and the camera's (with session id session), and applies
// the motion up to the cut on the first and the fixes on the second.
func heldCamera(t *testing.T, ctx context.Context, api pb.FusionServiceClient, seed uint64, session string) *cameraHeld {
	t.Helper()
	c := &cameraHeld{}
	c.before, c.after, c.fixes, c.cfg = splitRun(seed)
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: c.cfg}); err != nil {
		t.Fatal(err)
	}
	var err error
	if c.odo, err = openFeed(ctx, api, "robots/cart"); err != nil {
		t.Fatal(err)
	}
	if c.cam, err = openFeed(ctx, api, "robots/cart"); err != nil {
		t.Fatal(err)
	}
	c.cam.session = session
	c.odoResps = applyAll(t, c.odo, c.before)
	c.held = heldFixes(t, applyAll(t, c.cam, c.fixes))
	return c
}

// applyAll applies samples on f, failing on a refusal; it returns the
// verdicts.
func applyAll(t *testing.T, f *feed, samp []*pb.Sample) []*pb.IngestResponse {
	t.Helper()
	out := make([]*pb.IngestResponse, len(samp))
	for i, s := range samp {
		resp, err := f.apply(s)
		if err != nil {
			t.Fatal(err)
		}
		if resp.GetSequence() == 0 {
			t.Fatalf("sample %d refused: %s", i, resp.GetReason())
		}
		out[i] = resp
	}
	return out
}

// heldOf returns the held verdicts' client sequences by robot sequence.
func heldOf(resps []*pb.IngestResponse) map[uint64]uint64 {
	held := map[uint64]uint64{}
	for _, r := range resps {
		if r.GetVerdict() == pb.Verdict_VERDICT_HELD {
			held[r.GetSequence()] = r.GetClientSequence()
		}
	}
	return held
}

// heldFixes returns heldOf the camera's verdicts, of which there must be a
// few for the test to mean anything.
func heldFixes(t *testing.T, resps []*pb.IngestResponse) map[uint64]uint64 {
	t.Helper()
	held := heldOf(resps)
	if len(held) < 5 {
		t.Fatalf("%d fixes held; the scenario should hold about 10", len(held))
	}
	return held
}

// inlineResolutions returns the resolutions carried by verdicts (those
// their inputs decided).
func inlineResolutions(resps []*pb.IngestResponse) []*pb.Resolution {
	var out []*pb.Resolution
	for _, r := range resps {
		out = append(out, r.GetResolved()...)
	}
	return out
}

// checkResolutions checks that got resolves exactly the held inputs, once
// each, with their client sequences and a final verdict.
func checkResolutions(t *testing.T, got []*pb.Resolution, held map[uint64]uint64) {
	t.Helper()
	seen := map[uint64]bool{}
	for _, r := range got {
		want, ok := held[r.GetSequence()]
		switch {
		case !ok:
			t.Errorf("resolution of input %d, which this stream did not send held", r.GetSequence())
		case seen[r.GetSequence()]:
			t.Errorf("input %d resolved twice", r.GetSequence())
		case r.GetClientSequence() != want:
			t.Errorf("resolution of input %d carries client sequence %d, want %d", r.GetSequence(), r.GetClientSequence(), want)
		case r.GetVerdict() != pb.Verdict_VERDICT_APPLIED && r.GetVerdict() != pb.Verdict_VERDICT_GATED:
			t.Errorf("input %d resolved %v", r.GetSequence(), r.GetVerdict())
		}
		seen[r.GetSequence()] = true
	}
	if len(seen) != len(held) {
		t.Errorf("%d of %d held inputs resolved on their stream", len(seen), len(held))
	}
}

// journaledResolutions returns the sequences that the journal records as
// resolved, each with the client sequence of the input that resolved it.
func journaledResolutions(t *testing.T, dir string) map[uint64]uint64 {
	t.Helper()
	out := map[uint64]uint64{}
	if _, err := journal.Read(dir, "cart", journal.Visitor{Pair: func(in *pb.JournalInput, o *pb.JournalOutput) error {
		for _, r := range o.GetResponse().GetResolved() {
			if r.GetClientSequence() != 0 {
				t.Errorf("journaled resolution of %d carries client sequence %d", r.GetSequence(), r.GetClientSequence())
			}
			out[r.GetSequence()] = in.GetClientSequence()
		}
		return nil
	}}); err != nil {
		t.Fatal(err)
	}
	return out
}

// TestResolutionsReachSender: the odometry bridge and the camera feed one
// robot on two streams; the camera's fixes stamped past the newest odometry
// are held, and the bridge's later odometry decides them. Each stream
// receives exactly the verdicts of its own inputs: the camera gets the final
// verdict of every held fix (in responses of their own, while it sends
// nothing), the bridge none. The journal still records each resolution in
// the deciding odometry's response, and replays.
func TestResolutionsReachSender(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	api := dial(t, srv.addr)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	c := heldCamera(t, ctx, api, 31, "")
	odo, cam, held := c.odo, c.cam, c.held
	odoResps := append(c.odoResps, applyAll(t, odo, c.after)...)
	// The bridge's own held inputs (IMU headings stamped ahead of the
	// odometry), decided by its own odometry, and nothing else.
	checkResolutions(t, inlineResolutions(odoResps), heldOf(odoResps))
	// The camera receives them without sending anything more.
	var got []*pb.Resolution
	for len(got) < len(held) {
		resp, err := cam.Recv()
		if err != nil {
			t.Fatalf("after %d of %d resolutions: %v", len(got), len(held), err)
		}
		if !resolutionOnly(resp) {
			t.Fatalf("unexpected response %v", resp)
		}
		got = append(got, resp.GetResolved()...)
	}
	checkResolutions(t, got, held)
	for _, f := range []*feed{odo, cam} {
		if err := f.close(); err != nil {
			t.Fatal(err)
		}
		if len(f.resolved) != 0 {
			t.Errorf("more resolutions after the last: %v", f.resolved)
		}
	}
	srv.stop()
	odoSeqs := map[uint64]bool{}
	for _, r := range odoResps {
		odoSeqs[r.GetClientSequence()] = true
	}
	journaled := journaledResolutions(t, dir)
	for seq := range held {
		if by, ok := journaled[seq]; !ok || !odoSeqs[by] {
			t.Errorf("held input %d: the journal records its resolution with the odometry's input %d (%v)", seq, by, ok)
		}
	}
	offline(t, dir, "cart")
}

// TestResolutionsKeptForSession: a camera stream whose fixes are held
// ends before they are decided; the service keeps their final verdicts for
// its session id and sends them on the next stream with that id, after the
// answer to its first request. The bridge never receives them.
func TestResolutionsKeptForSession(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	api := dial(t, srv.addr)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	c := heldCamera(t, ctx, api, 32, "camera-7f3a")
	odo, cam, held, fixes := c.odo, c.cam, c.held, c.fixes
	half := len(fixes) / 2
	// The stream ends (the service has seen the end when close returns).
	if err := cam.close(); err != nil {
		t.Fatal(err)
	}
	odoResps := append(c.odoResps, applyAll(t, odo, c.after)...)
	checkResolutions(t, inlineResolutions(odoResps), heldOf(odoResps))
	again, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	again.session = cam.session
	again.sent.Store(cam.sent.Load())
	// A fix the odometry now covers: its verdict comes first, then the
	// resolutions kept for the session.
	resp, err := again.apply(fixes[half])
	if err != nil || resp.GetSequence() == 0 || len(again.resolved) != 0 {
		t.Fatalf("first response %v, %v (resolutions before it: %d)", resp, err, len(again.resolved))
	}
	if err := again.close(); err != nil {
		t.Fatal(err)
	}
	checkResolutions(t, again.resolved, held)
	if err := odo.close(); err != nil {
		t.Fatal(err)
	}
	if len(odo.resolved) != 0 {
		t.Errorf("the odometry stream received %d resolutions", len(odo.resolved))
	}
}

// TestParkedBounds: a session keeps its newest parkedPerSession
// resolutions, and the robot its parkedSessions most recently used
// sessions.
func TestParkedBounds(t *testing.T) {
	var p parkedResolutions
	for seq := uint64(1); seq <= parkedPerSession+5; seq++ {
		p.add("a", &pb.Resolution{Sequence: seq})
	}
	for k := 0; k < parkedSessions-1; k++ {
		p.add(fmt.Sprintf("s%d", k), &pb.Resolution{Sequence: 1})
	}
	p.add("a", &pb.Resolution{Sequence: parkedPerSession + 6}) // a is now the most recently used
	p.add("new", &pb.Resolution{Sequence: 1})                  // evicts s0
	if len(p.byID) != parkedSessions {
		t.Fatalf("%d sessions kept, want %d", len(p.byID), parkedSessions)
	}
	if p.take("s0") != nil || p.take("s1") == nil {
		t.Errorf("the session used longest ago was not the one forgotten")
	}
	got := p.take("a")
	if len(got) != parkedPerSession || got[0].GetSequence() != 7 || got[len(got)-1].GetSequence() != parkedPerSession+6 {
		t.Errorf("kept %d resolutions, %d to %d; want the newest %d", len(got), got[0].GetSequence(), got[len(got)-1].GetSequence(), parkedPerSession)
	}
	if p.take("a") != nil {
		t.Error("taken twice")
	}
}

// TestOrphansBound: the resolutions of deleted robots are kept for the
// orphanRobots robots most recently given one; a robot's are collected
// once, by its session.
func TestOrphansBound(t *testing.T) {
	var o orphans
	robots := make([]*robot, orphanRobots+1)
	for k := range robots {
		robots[k] = &robot{name: fmt.Sprintf("robots/r%d", k), deleted: true}
		o.add(robots[k], "s", &pb.Resolution{Sequence: uint64(k + 1)})
	}
	if int(o.n.Load()) != orphanRobots {
		t.Fatalf("%d robots kept, want %d", o.n.Load(), orphanRobots)
	}
	got := func(name, sid string) []*pb.Resolution {
		ob := newOutbox()
		o.collect(name, sid, ob)
		var out []*pb.Resolution
		resps := ob.drain()
		for k := range resps {
			out = append(out, resps[k].Resolved...)
		}
		return out
	}
	if len(got("robots/r0", "s")) != 0 {
		t.Error("the robot given one longest ago was kept")
	}
	if len(got("robots/r1", "other")) != 0 {
		t.Error("collected by another session")
	}
	if r := got("robots/r1", "s"); len(r) != 1 || r[0].GetSequence() != 2 {
		t.Errorf("collected %v, want robots/r1's resolution of input 2", r)
	}
	if len(got("robots/r1", "s")) != 0 || int(o.n.Load()) != orphanRobots-1 {
		t.Errorf("collected twice, or still counted (%d robots)", o.n.Load())
	}
}

// TestOrphansKeepNotTheRobot: the resolutions a deleted robot leaves for a
// session whose stream is gone do not keep the robot itself (its filter,
// its sessions' verdicts: about 3 MiB after 177,000 samples in 8 sessions,
// up to 8 MiB of verdicts alone), only its name: the robot is collected
// while they wait, and they are still collected by the session. Before,
// each of the 16 robots orphans keeps was held whole until collected,
// perhaps never.
func TestOrphansKeepNotTheRobot(t *testing.T) {
	s, err := New(Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	robot, held := deletedWithOrphans(t, s)
	runtime.GC()
	runtime.GC()
	if robot.Value() != nil {
		t.Error("the deleted robot is kept while its resolutions wait")
	}
	ob := newOutbox()
	s.orphans.collect("robots/cart", "camera-e4d2", ob)
	got := 0
	resps := ob.drain()
	for k := range resps {
		for _, res := range resps[k].Resolved {
			if res.GetRefusal() != pb.Refusal_REFUSAL_ROBOT_DELETED || held[res.GetSequence()] != res.GetClientSequence() {
				t.Errorf("collected %v; want the held inputs %v resolved REFUSAL_ROBOT_DELETED", res, held)
			}
			got++
		}
	}
	if got != len(held) {
		t.Errorf("collected %d resolutions, want %d", got, len(held))
	}
}

// deletedWithOrphans makes robots/cart on s, holds a camera's fixes sent
// with session id camera-e4d2 on a stream that then ends, and deletes the
// robot: it returns a weak pointer to the robot and the held inputs
// (robot sequence: client sequence). A function of its own, so that no
// frame of the test's keeps the robot.
//
//go:noinline
func deletedWithOrphans(t *testing.T, s *Server) (weak.Pointer[robot], map[uint64]uint64) {
	ctx := context.Background()
	before, _, fixes, cfg := splitRun(34)
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	r, err := s.lookup("robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	feedIn := func(ob *outbox, samples []*pb.Sample, session string) []*pb.IngestResponse {
		sc := &scratch{verdicts: slab{next: verdictSlabStart}}
		var resps []*pb.IngestResponse
		for i, sm := range samples {
			req := &arrivedRequest{IngestRequest: pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 1), Sample: sm, SessionId: session}}
			out := s.ingestStream([]*arrivedRequest{req}, ob, sc)
			resps = append(resps, proto.CloneOf(&out[0].IngestResponse))
		}
		return resps
	}
	feedIn(newOutbox(), before, "bridge")
	cam := newOutbox()
	held := heldFixes(t, feedIn(cam, fixes, "camera-e4d2"))
	cam.close(true, &s.orphans)
	if _, err := s.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	return weak.Make(r), held
}
