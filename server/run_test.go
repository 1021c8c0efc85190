package server

import (
	"context"
	"math"
	"strings"
	"syscall"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// rebootRun is a cart's run in which the controller restarts at input
// mid: the inputs before it (run 1) and after it on the restarted clock
// (run 2), with the simulator's inputs of run 2 for their truth.
func rebootRun(seed uint64, seconds float64) (run1, run2 []*pb.Sample, ins2 []fusiontest.Input, cfg *pb.RobotConfig) {
	samp, ins, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: seed, DurationS: seconds})
	mid := len(samp) / 2
	ins2 = fusiontest.Reboot(ins, mid)
	for i := range ins2 {
		run2 = append(run2, toProto(&ins2[i]))
	}
	return samp[:mid], run2, ins2, cfg
}

func runStart(boot string, run uint64) *pb.Sample {
	return &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: boot, Run: run}}}
}

// journaledByRun reads the robot's journal: every input's recorded
// response by sequence, and the inputs of each run (by replay).
func journaledByRun(t *testing.T, dir string) (map[uint64]*pb.IngestResponse, map[uint64]uint64, map[uint64]int) {
	t.Helper()
	responses, clientSeq, byRun := map[uint64]*pb.IngestResponse{}, map[uint64]uint64{}, map[uint64]int{}
	_, _, err := journal.Replay(dir, "cart", journal.ReplayOptions{Check: true, Input: func(x *journal.Replayed) error {
		responses[x.Input.GetSequence()] = x.Recorded.GetResponse()
		clientSeq[x.Input.GetSequence()] = x.Input.GetClientSequence()
		byRun[x.Robot.Run()]++
		return nil
	}})
	if err != nil {
		t.Fatal(err)
	}
	return responses, clientSeq, byRun
}

// TestRunLifecycle: a controller reboot mid-run over a real gRPC loopback
// connection. The restarted clock is refused with the remedy named, a run
// start begins run 2 with the pose carried over, the robot continues on
// the new clock and stays near the truth, a resent run start starts no
// further run, every acknowledged input is in the journal, a replay sees
// both runs, and a restarted service restores run 2.
func TestRunLifecycle(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	c := dial(t, srv.addr)
	ctx := context.Background()
	run1, run2, ins2, cfg := rebootRun(21, 20)
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(ctx, c, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	f.session = "cart-controller"
	acked := map[uint64]*pb.IngestResponse{}
	send := func(s *pb.Sample) *pb.IngestResponse {
		t.Helper()
		resp, err := f.apply(s)
		if err != nil {
			t.Fatal(err)
		}
		if resp.GetSequence() != 0 {
			acked[resp.GetSequence()] = resp
		}
		return resp
	}
	for _, s := range run1 {
		send(s)
	}
	// The controller restarted: its first odometry is refused, naming the
	// remedy, and changes nothing.
	var firstOdo int
	for firstOdo = 0; run2[firstOdo].GetOdometry() == nil; firstOdo++ {
	}
	resp := send(run2[firstOdo])
	if resp.GetSequence() != 0 || resp.GetRefusal() != pb.Refusal_REFUSAL_TIME_BACKWARDS || !strings.Contains(resp.GetReason(), "start a new run") {
		t.Fatalf("the rebooted clock's odometry: %v", resp)
	}
	before, err := c.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || before.GetRobot().GetRun() != 1 {
		t.Fatalf("before the run start: %v %v", before, err)
	}
	began := send(runStart("boot-2", 2))
	if began.GetVerdict() != pb.Verdict_VERDICT_APPLIED || began.GetSequence() != before.GetRobot().GetInputCount()+1 {
		t.Fatalf("run start: %v", began)
	}
	// The same request again (a retry) gets the same verdict; a further
	// run start with the same boot id is refused.
	f.sent.Add(^uint64(0))
	if again := send(runStart("boot-2", 2)); !proto.Equal(again, began) {
		t.Errorf("resent run start: %v, want %v", again, began)
	}
	if again := send(runStart("boot-2", 0)); again.GetSequence() != 0 || again.GetRefusal() != pb.Refusal_REFUSAL_RUN_OUT_OF_ORDER || again.GetField() != "sample.run_start.boot_id" {
		t.Errorf("second run start of the same boot: %v", again)
	}
	refused := 0
	for _, s := range run2 {
		if send(s).GetSequence() == 0 {
			refused++
		}
	}
	if refused != 0 {
		t.Errorf("%d of run 2's %d inputs refused", refused, len(run2))
	}
	if err := f.close(); err != nil {
		t.Fatal(err)
	}
	got, err := c.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	rb := got.GetRobot()
	if rb.GetRun() != 2 || rb.GetBootId() != "boot-2" || rb.GetInputCount() != uint64(len(acked)) {
		t.Fatalf("after run 2: run %d boot %q, %d inputs, %d acknowledged", rb.GetRun(), rb.GetBootId(), rb.GetInputCount(), len(acked))
	}
	last := ins2[len(ins2)-1]
	pose, err := c.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: rb.GetNewestStampNs()})
	if err != nil {
		t.Fatal(err)
	}
	// 0.3 m: a few standard deviations of the cart's position with its
	// camera (the 95% radius stays near 0.1 m in this scenario).
	if d := math.Hypot(pose.GetPose().GetPose().GetXM()-last.Truth.X, pose.GetPose().GetPose().GetYM()-last.Truth.Y); d > 0.3 {
		t.Errorf("run 2 ends %.2f m from the truth", d)
	}
	srv.stop()

	responses, clientSeq, byRun := journaledByRun(t, dir)
	for seq, resp := range acked {
		if !proto.Equal(responses[seq], journaledForm(t, resp, clientSeq)) {
			t.Fatalf("acknowledged input %d is not in the journal as sent", seq)
		}
	}
	if byRun[1] != len(run1) || byRun[2] != len(run2)+1 {
		t.Errorf("replay: %v inputs by run, want %d and %d", byRun, len(run1), len(run2)+1)
	}

	srv = start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	c = dial(t, srv.addr)
	again, err := c.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	if r := again.GetRobot(); r.GetRun() != 2 || r.GetBootId() != "boot-2" || r.GetInputCount() != rb.GetInputCount() || r.GetState() != pb.RobotState_ROBOT_STATE_SERVING {
		t.Errorf("restored: %v", r)
	}
	p2, err := c.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: rb.GetNewestStampNs()})
	if err != nil || !proto.Equal(p2.GetPose().GetPose(), pose.GetPose().GetPose()) {
		t.Errorf("restored pose %v, was %v (%v)", p2.GetPose().GetPose(), pose.GetPose().GetPose(), err)
	}
}

// TestStartRunRPC: the StartRun rpc starts the next run and refuses a bad
// one with a status naming the field.
func TestStartRunRPC(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	c := dial(t, srv.addr)
	ctx := context.Background()
	run1, _, _, cfg := rebootRun(22, 4)
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	feedStub(t, c, "robots/cart", "", 1, run1)
	resp, err := c.StartRun(ctx, &pb.StartRunRequest{Robot: "robots/cart", RunStart: &pb.RunStart{BootId: "by-hand"}})
	if err != nil || resp.GetRun() != 2 || resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED || resp.GetSequence() != uint64(len(run1)+1) {
		t.Fatalf("StartRun: %v %v", resp, err)
	}
	cases := []struct {
		name  string
		rs    *pb.RunStart
		code  codes.Code
		field string
	}{
		{"missing", nil, codes.InvalidArgument, "run_start"},
		{"empty boot id", &pb.RunStart{}, codes.InvalidArgument, "run_start.boot_id"},
		{"boot id too long", &pb.RunStart{BootId: strings.Repeat("b", 129)}, codes.InvalidArgument, "run_start.boot_id"},
		{"run backwards", &pb.RunStart{BootId: "x", Run: 1}, codes.FailedPrecondition, "run_start.run"},
		{"same boot", &pb.RunStart{BootId: "by-hand"}, codes.FailedPrecondition, "run_start.boot_id"},
		{"covariance without pose", &pb.RunStart{BootId: "x", Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}}}, codes.InvalidArgument, "run_start.pose"},
	}
	for _, tc := range cases {
		_, err := c.StartRun(ctx, &pb.StartRunRequest{Robot: "robots/cart", RunStart: tc.rs})
		// The request's own field first: StartRunRequest has no sample
		// (the message began "bad sample: sample.run_start" before).
		if st := status.Convert(err); st.Code() != tc.code || !strings.HasPrefix(st.Message(), tc.field+":") {
			t.Errorf("%s: %v, want %v starting with %s", tc.name, err, tc.code, tc.field)
		}
	}
	got, err := c.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || got.GetRobot().GetRun() != 2 || got.GetRobot().GetInputCount() != uint64(len(run1)+1) {
		t.Errorf("after the refusals: %v %v", got, err)
	}
	list, err := c.ListRobots(ctx, &pb.ListRobotsRequest{})
	if err != nil || len(list.GetRobots()) != 1 || list.GetRobots()[0].GetRun() != 2 {
		t.Errorf("ListRobots: %v %v", list, err)
	}
}

// TestRunSwitchFaults: the journal write that carries a run start fails;
// the run start is answered UNAVAILABLE and not applied (the robot stays
// in run 1, rebuilt from its journal); resent, it is taken. A power loss
// right after the acknowledged switch (fsync each) keeps it: the restored
// robot is in run 2 with every acknowledged input.
func TestRunSwitchFaults(t *testing.T) {
	mem := faultfs.NewMem()
	ffs := faultfs.New(mem, nil)
	s, err := New(Options{JournalDir: "/j", FS: ffs, SyncEach: true})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	run1, run2, _, cfg := rebootRun(23, 4)
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	acked := 0
	for _, smp := range run1 {
		if s.ingest("robots/cart", 0, smp).GetSequence() != 0 {
			acked++
		}
	}
	ffs.SetInject(faultfs.Nth(faultfs.OpWrite, ".rjl", 0, syscall.EIO))
	resp := s.ingest("robots/cart", 0, runStart("boot-2", 0))
	if resp.GetSequence() != 0 || resp.GetStatusCode() != int32(codes.Unavailable) {
		t.Fatalf("run start whose write failed: %v", resp)
	}
	if r, _ := s.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"}); r.GetRobot().GetRun() != 1 || r.GetRobot().GetInputCount() != uint64(acked) {
		t.Fatalf("after the failed write: %v", r.GetRobot())
	}
	if resp := s.ingest("robots/cart", 0, runStart("boot-2", 0)); resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
		t.Fatalf("resent run start: %v", resp)
	}
	acked++
	for _, smp := range run2[:100] {
		if s.ingest("robots/cart", 0, smp).GetSequence() != 0 {
			acked++
		}
	}
	// The power fails now: only what was synced survives.
	crashed := mem.Crash()
	s.Close()
	s2, err := New(Options{JournalDir: "/j", FS: crashed})
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if _, err := s2.Restore(); err != nil {
		t.Fatal(err)
	}
	r, err := s2.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	if rb := r.GetRobot(); rb.GetRun() != 2 || rb.GetBootId() != "boot-2" || rb.GetInputCount() != uint64(acked) {
		t.Errorf("restored after the power loss: run %d boot %q, %d inputs; %d acknowledged", rb.GetRun(), rb.GetBootId(), rb.GetInputCount(), acked)
	}
	for _, smp := range run2[100:] {
		if resp := s2.ingest("robots/cart", 0, smp); resp.GetSequence() == 0 {
			t.Fatalf("run 2 after restore: %v", resp)
		}
	}
}

// TestRunSwitchSIGKILL kills the daemon (SIGKILL, a child process) the
// moment the run start's verdict arrives, with run 2's inputs streaming in
// behind it: every acknowledged input is in the journal as sent, and the
// restarted service restores the robot in run 2 and takes the rest of it.
func TestRunSwitchSIGKILL(t *testing.T) {
	dir := t.TempDir()
	cmd, addr := startChild(t, dir)
	defer cmd.Process.Kill()
	c := dial(t, addr)
	ctx := context.Background()
	run1, run2, _, cfg := rebootRun(24, 10)
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(ctx, c, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	all := append(append(append([]*pb.Sample(nil), run1...), runStart("boot-2", 0)), run2...)
	go func() {
		for _, s := range all {
			if f.send(s) != nil {
				return
			}
		}
	}()
	acked := map[uint64]*pb.IngestResponse{}
	for {
		resp, err := f.Recv()
		if err != nil {
			t.Fatalf("stream ended before the run start's verdict: %v", err)
		}
		acked[resp.GetSequence()] = resp
		if resp.GetClientSequence() == uint64(len(run1)+1) {
			if resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
				t.Fatalf("run start: %v", resp)
			}
			cmd.Process.Signal(syscall.SIGKILL)
			break
		}
	}
	cmd.Wait()
	responses, clientSeq, byRun := journaledByRun(t, dir)
	for seq, resp := range acked {
		if !proto.Equal(responses[seq], journaledForm(t, resp, clientSeq)) {
			t.Fatalf("acknowledged input %d is not in the journal as sent", seq)
		}
	}
	t.Logf("killed at the run switch: %d acknowledged, journal by run %v", len(acked), byRun)
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	c2 := dial(t, srv.addr)
	got, err := c2.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	rb := got.GetRobot()
	if rb.GetRun() != 2 || rb.GetInputCount() < uint64(len(run1)+1) {
		t.Fatalf("restored: run %d, %d inputs", rb.GetRun(), rb.GetInputCount())
	}
	// The rest of run 2 goes in: what the journal holds of it was taken.
	rest := run2[int(rb.GetInputCount())-len(run1)-1:]
	for i, resp := range feedStub(t, c2, "robots/cart", "", 1, rest) {
		if resp.GetSequence() == 0 {
			t.Fatalf("run 2 input %d after the restart: %v", i, resp)
		}
	}
}

// TestRunSwitchShortWrite: the one write of a batch that holds a run start
// and the new run's first samples stops half way (a disk that fills up).
// The inputs written whole keep their verdicts, the others are answered
// UNAVAILABLE; the robot, rebuilt from its journal, is in run 2 exactly
// when the run start was acknowledged, and so is the robot a restart
// restores.
func TestRunSwitchShortWrite(t *testing.T) {
	mem := faultfs.NewMem()
	ffs := faultfs.New(mem, nil)
	ffs.ShortWrite = true
	s, err := New(Options{JournalDir: "/j", FS: ffs})
	if err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	run1, run2, _, cfg := rebootRun(25, 3)
	if _, err := s.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	for _, smp := range run1 {
		s.ingest("robots/cart", 0, smp)
	}
	batch := []*arrivedRequest{{IngestRequest: pb.IngestRequest{Robot: "robots/cart", Sample: runStart("boot-2", 0)}}}
	for _, smp := range run2[:6] {
		batch = append(batch, &arrivedRequest{IngestRequest: pb.IngestRequest{Robot: "robots/cart", Sample: smp}})
	}
	ffs.SetInject(faultfs.Nth(faultfs.OpWrite, ".rjl", 0, syscall.ENOSPC))
	out := s.ingestBatch(batch)
	ffs.SetInject(nil)
	acked, lost := 0, 0
	for k := range out {
		switch resp := &out[k].IngestResponse; {
		case resp.GetSequence() != 0 && lost == 0:
			acked++
		case resp.GetStatusCode() == int32(codes.Unavailable):
			lost++
		default:
			t.Fatalf("input %d of the batch: %v (after %d acknowledged, %d unavailable)", k, resp, acked, lost)
		}
	}
	if lost == 0 {
		t.Fatal("the short write cost nothing: the test tests nothing")
	}
	wantRun := uint64(1)
	if acked > 0 {
		wantRun = 2
	}
	check := func(what string, s *Server) {
		t.Helper()
		r, err := s.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
		if err != nil {
			t.Fatal(err)
		}
		if rb := r.GetRobot(); rb.GetRun() != wantRun || rb.GetInputCount() != uint64(len(run1)+acked) {
			t.Errorf("%s: run %d, %d inputs; want run %d, %d inputs (%d of the batch acknowledged)", what, rb.GetRun(), rb.GetInputCount(), wantRun, len(run1)+acked, acked)
		}
	}
	check("rebuilt", s)
	s.Close()
	s2, err := New(Options{JournalDir: "/j", FS: mem})
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if _, err := s2.Restore(); err != nil {
		t.Fatal(err)
	}
	check("restored", s2)
	t.Logf("%d of the batch acknowledged, %d unavailable", acked, lost)
}
