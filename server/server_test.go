package server

import (
	"context"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// TestEndToEnd: over a real gRPC connection on loopback, the cart's
// odometry bridge and its camera feed one robot as two clients while a third
// watches. Every watched pose equals the pose that fusion computes offline
// from the same samples in the same order, and the journal replays to the
// same outputs.
func TestEndToEnd(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	ctx := context.Background()
	cart, camera, watcher := dial(t, srv.addr), dial(t, srv.addr), dial(t, srv.addr)
	samp, ins, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 5, DurationS: 20, OutlierFraction: 0.05})
	if _, err := cart.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	odo, err := openFeed(ctx, cart, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	cam, err := openFeed(ctx, camera, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	var watched []*pb.FusedPose
	wctx, stopWatch := context.WithCancel(ctx)
	var wg sync.WaitGroup
	wg.Add(1)
	first, all := make(chan struct{}), make(chan struct{})
	go func() {
		defer wg.Done()
		watch(wctx, watcher, "robots/cart", func(p *pb.FusedPose) {
			if len(watched) == 0 {
				close(first)
			}
			watched = append(watched, p)
			if p.GetSequence() == uint64(len(samp)) {
				close(all)
			}
		})
	}()
	<-first
	responses := make([]*pb.IngestResponse, len(samp))
	for i, s := range samp {
		sess := odo
		if ins[i].Fix != nil {
			sess = cam
		}
		if responses[i], err = sess.apply(s); err != nil {
			t.Fatal(err)
		}
		if responses[i].GetStatusCode() != 0 && responses[i].GetVerdict() == pb.Verdict_VERDICT_INVALID {
			t.Fatalf("sample %d refused: %s", i, responses[i].GetReason())
		}
	}
	// The newest pose reaches the watcher, however loaded the machine;
	// the deadline only ends a test that would fail anyway.
	select {
	case <-all:
	case <-time.After(30 * time.Second):
	}
	stopWatch()
	wg.Wait()

	// Offline, the same samples in the same order.
	fcfg, err := convert.ConfigFromProto(cfg)
	if err != nil {
		t.Fatal(err)
	}
	fr, _ := fusion.New(fcfg)
	offline := map[uint64]*pb.FusedPose{0: convert.PoseToProto("robots/cart", fr.Pose(), 0)}
	// Each held sample's final verdict goes to the stream that sent it: in
	// the deciding sample's response on that stream, in a response of its
	// own on the other (IngestResponse.resolved).
	type sender struct {
		f         *feed
		clientSeq uint64
	}
	heldBy := map[uint64]sender{}
	elsewhere := map[*feed][]*pb.Resolution{}
	journaled := make([]*pb.IngestResponse, len(samp))
	for i, s := range samp {
		resp, _ := convert.Take(fr, s, responses[i].GetClientSequence())
		journaled[i] = resp
		f := odo
		if ins[i].Fix != nil {
			f = cam
		}
		want := proto.CloneOf(resp)
		want.Resolved = nil
		for _, r := range resp.GetResolved() {
			by, ok := heldBy[r.GetSequence()]
			if !ok {
				t.Fatalf("sample %d resolves input %d, which no stream had held", i, r.GetSequence())
			}
			r = proto.CloneOf(r)
			r.ClientSequence = by.clientSeq
			if by.f == f {
				want.Resolved = append(want.Resolved, r)
			} else {
				elsewhere[by.f] = append(elsewhere[by.f], r)
			}
		}
		if !proto.Equal(want, responses[i]) {
			t.Fatalf("sample %d: served verdict %v, offline %v", i, responses[i], want)
		}
		if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
			heldBy[resp.GetSequence()] = sender{f, resp.GetClientSequence()}
		}
		offline[resp.GetSequence()] = convert.PoseToProto("robots/cart", fr.Pose(), resp.GetSequence())
	}
	if len(watched) < 2 {
		t.Fatalf("watched %d poses", len(watched))
	}
	for _, p := range watched {
		want, ok := offline[p.GetSequence()]
		if !ok || !proto.Equal(p, want) {
			t.Fatalf("watched pose at sequence %d differs from offline:\n%v\n%v", p.GetSequence(), p, want)
		}
	}
	if last := watched[len(watched)-1]; last.GetSequence() != uint64(len(samp)) {
		t.Errorf("last watched pose is at sequence %d of %d", last.GetSequence(), len(samp))
	}
	if err := odo.close(); err != nil {
		t.Fatal(err)
	}
	if err := cam.close(); err != nil {
		t.Fatal(err)
	}
	for _, f := range []*feed{odo, cam} {
		if len(f.resolved) != len(elsewhere[f]) {
			t.Fatalf("a stream received %d resolutions of its held samples in responses of their own, want %d", len(f.resolved), len(elsewhere[f]))
		}
		for k, r := range f.resolved {
			if !proto.Equal(r, elsewhere[f][k]) {
				t.Fatalf("resolution %d received %v, want %v", k, r, elsewhere[f][k])
			}
		}
	}
	srv.stop()

	// The journal replays to exactly the recorded outputs.
	fr2, scan, err := journal.Replay(dir, "cart", journal.ReplayOptions{Check: true})
	if err != nil {
		t.Fatal(err)
	}
	if scan.Pairs != len(samp) || scan.Torn != nil {
		t.Errorf("journal holds %d pairs (torn %v), want %d", scan.Pairs, scan.Torn, len(samp))
	}
	if a, b := fr2.Pose(), fr.Pose(); a.Pose != b.Pose || a.Cov != b.Cov {
		t.Errorf("replayed pose %+v, offline %+v", a.Pose, b.Pose)
	}
	// The journal holds each sample as sent (kept as it arrived, not encoded
	// again) and each verdict as answered (sent as it was journaled).
	bySeq := map[uint64]int{}
	for i, r := range responses {
		bySeq[r.GetSequence()] = i
	}
	n := 0
	if _, err := journal.Read(dir, "cart", journal.Visitor{Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		i, ok := bySeq[in.GetSequence()]
		switch {
		case !ok:
			t.Errorf("journal input with sequence %d was never answered", in.GetSequence())
		case !proto.Equal(in.GetSample(), samp[i]):
			t.Errorf("journal input %d is %v, the sample sent was %v", in.GetSequence(), in.GetSample(), samp[i])
		case !proto.Equal(out.GetResponse(), journaled[i]):
			t.Errorf("journal output %d is %v, the verdict computed offline (and received, resolutions by their senders) was %v", in.GetSequence(), out.GetResponse(), journaled[i])
		}
		n++
		return nil
	}}); err != nil || n != len(samp) {
		t.Errorf("journal scan: %d pairs, %v", n, err)
	}
	// And a restarted service restores the robot where it was.
	srv2 := start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv2.stop()
	c := dial(t, srv2.addr)
	got, err := c.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	if got.GetRobot().GetInputCount() != uint64(len(samp)) {
		t.Errorf("restored robot has %d inputs, want %d", got.GetRobot().GetInputCount(), len(samp))
	}
	p, err := c.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: fr.NewestNs()})
	if err != nil {
		t.Fatal(err)
	}
	if want := convert.PoseToProto("robots/cart", fr.Pose(), fr.Sequence()); !proto.Equal(p.GetPose().GetPose(), want.GetPose()) {
		t.Errorf("restored pose %v, want %v", p.GetPose().GetPose(), want.GetPose())
	}
}

// TestRestoreTornTail: a journal whose tail was torn by a crash is restored
// up to its last good record, and the tear is reported.
func TestRestoreTornTail(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	c := dial(t, srv.addr)
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, Seed: 6, DurationS: 2})
	ctx := context.Background()
	c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	sess, _ := openFeed(ctx, c, "robots/cart")
	for _, s := range samp {
		if _, err := sess.apply(s); err != nil {
			t.Fatal(err)
		}
	}
	sess.close()
	srv.stop()
	path := journal.SegmentPath(dir, "cart", 0)
	b, _ := os.ReadFile(path)
	for _, damage := range []string{"truncate", "corrupt"} {
		bad := append([]byte(nil), b...)
		if damage == "truncate" {
			bad = bad[:len(bad)-11]
		} else {
			bad[len(bad)-5] ^= 0x55
		}
		os.WriteFile(path, bad, 0o644)
		s, err := New(Options{JournalDir: dir})
		if err != nil {
			t.Fatal(err)
		}
		reports, err := s.Restore()
		if err != nil {
			t.Fatalf("%s: %v", damage, err)
		}
		if len(reports) != 1 || reports[0].Torn == "" || reports[0].Inputs != len(samp)-1 {
			t.Errorf("%s: reports %+v, want one torn with %d inputs", damage, reports, len(samp)-1)
		}
		s.Close()
		os.WriteFile(path, b, 0o644)
	}
}

// The journal directory layout is documented; a test pins it.
func TestJournalFileName(t *testing.T) {
	if got := filepath.Base(journal.SegmentPath("/j", "cart", 3)); got != "cart.000003.rjl" {
		t.Errorf("segment name %q", got)
	}
}

// cartServed starts a service with robots/cart made (cartRun's, seed 3,
// one second) and returns a client of it, the run's samples and the
// robot's configuration; the service stops at the test's end.
func cartServed(t *testing.T) (pb.FusionServiceClient, []*pb.Sample, *pb.RobotConfig) {
	t.Helper()
	srv := start(t, testConfig{})
	t.Cleanup(srv.stop)
	api := stub(t, srv.addr)
	samp, cfg := cartRun(3, 1)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	return api, samp, cfg
}

// TestStreamFollowsRobotRecreated: a stream keeps the robot it fed last
// (lookupFrom); once that robot is deleted the stream's samples for its
// name are refused as for no robot, and once a robot of the same name is
// made again they go to the new one, over a real connection on loopback.
func TestStreamFollowsRobotRecreated(t *testing.T) {
	api, samp, cfg := cartServed(t)
	ctx := context.Background()
	st, err := api.Ingest(ctx)
	if err != nil {
		t.Fatal(err)
	}
	send := func(i int) *pb.IngestResponse {
		t.Helper()
		if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 1), Sample: samp[i]}); err != nil {
			t.Fatal(err)
		}
		resp, err := st.Recv()
		if err != nil {
			t.Fatal(err)
		}
		return resp
	}
	for i := range 3 {
		if r := send(i); r.GetSequence() != uint64(i+1) || r.GetStatusCode() != 0 {
			t.Fatalf("sample %d to the first robot: %v", i, r)
		}
	}
	if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
		t.Fatal(err)
	}
	if r := send(3); r.GetVerdict() != pb.Verdict_VERDICT_INVALID || codes.Code(r.GetStatusCode()) != codes.NotFound {
		t.Fatalf("sample for the deleted robot: %v", r)
	}
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	// The new robot's first input is numbered 1: the stream feeds it, not
	// the deleted one (which had taken 3).
	if r := send(0); r.GetSequence() != 1 || r.GetStatusCode() != 0 {
		t.Fatalf("first sample to the robot made again: %v", r)
	}
}

// TestCreateRobotWhileFed: a stream feeding a robot's name while the robot
// is made again (deleted and created, 20 times) takes its samples into
// each new robot as soon as it is published; CreateRobot's response,
// which describes the new robot (input count, newest stamp), must be read
// under the robot's lock. Before, it was read after the lock was let go,
// a data race with the stream that go test -race reports (the race
// detector, not timing, is what fails).
func TestCreateRobotWhileFed(t *testing.T) {
	api, samp, cfg := cartServed(t)
	ctx := context.Background()
	done := make(chan error, 1)
	go func() {
		for range 20 {
			if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart"}); err != nil {
				done <- err
				return
			}
			if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
				done <- err
				return
			}
		}
		done <- nil
	}()
	st, err := api.Ingest(ctx)
	if err != nil {
		t.Fatal(err)
	}
	for i := 0; ; i++ {
		select {
		case err := <-done:
			if err != nil {
				t.Fatal(err)
			}
			return
		default:
		}
		if err := st.Send(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i + 1), Sample: samp[i%len(samp)]}); err != nil {
			t.Fatal(err)
		}
		resp, err := st.Recv()
		if err != nil {
			t.Fatal(err)
		}
		// Taken by a robot, refused for none (deleted meanwhile), or as
		// too old for a new one that took a later sample of the cycle.
		if c := codes.Code(resp.GetStatusCode()); c != codes.OK && c != codes.NotFound && resp.GetRefusal() != pb.Refusal_REFUSAL_TOO_OLD {
			t.Fatalf("sample %d: %v", i, resp)
		}
	}
}
