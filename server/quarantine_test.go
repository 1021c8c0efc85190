package server

import (
	"context"
	"os"
	"runtime"
	"slices"
	"strconv"
	"strings"
	"testing"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// twoCarts serves two robots with journals in dir, feeds each a short run
// and stops.
func twoCarts(t *testing.T, dir string, opt Options) {
	t.Helper()
	opt.JournalDir = dir
	srv := start(t, testConfig{Options: opt})
	api := stub(t, srv.addr)
	ctx := context.Background()
	for _, id := range []string{"cart-a", "cart-b"} {
		samp, cfg := cartRun(6, 3)
		if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			t.Fatal(err)
		}
		feedStub(t, api, RobotName(id), "s-"+id, 1, samp)
	}
	srv.stop()
}

// twoCartsOneGarbled makes twoCarts' journals in a new directory and
// writes garbage over a stretch of cart-b's records: the journal keeps the
// bytes aside and reads on, but the inputs in them are lost, a gap that
// restore cannot replay across. It returns the directory and the segment.
func twoCartsOneGarbled(t *testing.T) (dir, bad string) {
	t.Helper()
	dir = t.TempDir()
	twoCarts(t, dir, Options{})
	bad = journal.SegmentPath(dir, "cart-b", 0)
	b, err := os.ReadFile(bad)
	if err != nil {
		t.Fatal(err)
	}
	for i := len(b) / 2; i < len(b)/2+4096; i++ {
		b[i] = 0xa5
	}
	if err := os.WriteFile(bad, b, 0o644); err != nil {
		t.Fatal(err)
	}
	return dir, bad
}

// TestQuarantineAtRestore: a robot whose journal cannot be restored stays
// listed as quarantined, naming the problem and the file; every rpc on it
// but DeleteRobot (TestDeleteQuarantined) answers FAILED_PRECONDITION; the
// other robot serves.
func TestQuarantineAtRestore(t *testing.T) {
	dir, bad := twoCartsOneGarbled(t)

	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	reports, err := s.Restore()
	s.Close()
	if err != nil || len(reports) != 2 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING ||
		reports[1].State != pb.RobotState_ROBOT_STATE_QUARANTINED || !strings.Contains(reports[1].Detail, bad) {
		t.Fatalf("restore: %v %+v", err, reports)
	}
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	api := stub(t, srv.addr)
	ctx := context.Background()
	list, err := api.ListRobots(ctx, &pb.ListRobotsRequest{})
	if err != nil || len(list.GetRobots()) != 2 {
		t.Fatalf("list: %v %v", err, list)
	}
	q := list.GetRobots()[1]
	if q.GetState() != pb.RobotState_ROBOT_STATE_QUARANTINED || !strings.Contains(q.GetStateDetail(), "cart-b.000000.rjl") {
		t.Errorf("quarantined robot listed as %v %q", q.GetState(), q.GetStateDetail())
	}
	if list.GetRobots()[0].GetState() != pb.RobotState_ROBOT_STATE_SERVING {
		t.Errorf("cart-a is %v", list.GetRobots()[0].GetState())
	}
	samp, _ := cartRun(6, 4)
	v := feedStub(t, api, "robots/cart-b", "", 1, samp[len(samp)-1:])[0]
	if codes.Code(v.GetStatusCode()) != codes.FailedPrecondition || v.GetSequence() != 0 || !strings.Contains(v.GetReason(), "cart-b.000000.rjl") {
		t.Errorf("ingest to the quarantined robot: %v", v)
	}
	calls := map[string]error{}
	_, calls["GetPoseAt"] = api.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart-b"})
	_, calls["GetStatistics"] = api.GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: "robots/cart-b"})
	_, calls["ReseedRobot"] = api.ReseedRobot(ctx, &pb.ReseedRobotRequest{Robot: "robots/cart-b", Reseed: &pb.Reseed{StampNs: 1, Pose: &pb.FloorPose{}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}}}})
	w, err := api.Watch(ctx, &pb.WatchRequest{Robot: "robots/cart-b"})
	if err == nil {
		_, err = w.Recv()
	}
	calls["Watch"] = err
	for name, err := range calls {
		if codeOf(err) != codes.FailedPrecondition || !strings.Contains(err.Error(), "quarantined") {
			t.Errorf("%s of the quarantined robot: %v", name, err)
		}
	}
	// The other robot serves: its next samples are taken.
	for _, v := range feedStub(t, api, "robots/cart-a", "", 1, samp[len(samp)-20:]) {
		if v.GetSequence() == 0 {
			t.Errorf("cart-a refused %v", v)
		}
	}
}

// rewriteJournal writes the robot's journal again into a new directory with
// the opening's build replaced and edit applied to every output, as an
// older build that computed other outputs would have left it.
func rewriteJournal(t *testing.T, from, to, id, build string, edit func(*pb.JournalOutput)) {
	t.Helper()
	var w *journal.Writer
	_, err := journal.Read(from, id, journal.Visitor{
		Opening: func(op *pb.JournalOpening) error {
			op = proto.Clone(op).(*pb.JournalOpening)
			op.Build = build
			var err error
			w, err = journal.Create(to, id, op, journal.Options{})
			return err
		},
		Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
			edit(out)
			return w.AddPair(in, out)
		}})
	if err == nil {
		_, err = w.Flush()
	}
	if err != nil {
		t.Fatal(err)
	}
	w.Close()
}

// TestOlderBuildJournalRestores: a journal whose recorded outputs differ
// from what this build computes restores and serves when another build
// wrote it, with a note counting the outputs that differ (the records stay
// as they are); written by this same build, the difference is damage and
// the robot is quarantined.
func TestOlderBuildJournalRestores(t *testing.T) {
	dir := t.TempDir()
	twoCarts(t, dir, Options{Build: "old-build"})
	old := t.TempDir()
	// The older build's fix statistic was computed differently.
	changed := 0
	rewriteJournal(t, dir, old, "cart-a", "old-build", func(out *pb.JournalOutput) {
		if out.GetResponse().GetNis() != 0 {
			out.Response.Nis *= 1.5
			changed++
		}
	})
	before, _ := os.ReadFile(journal.SegmentPath(old, "cart-a", 0))
	for _, tc := range []struct {
		build string
		state pb.RobotState
	}{{"old-build", pb.RobotState_ROBOT_STATE_QUARANTINED}, {"new-build", pb.RobotState_ROBOT_STATE_SERVING}} {
		s, err := New(Options{JournalDir: old, Build: tc.build})
		if err != nil {
			t.Fatal(err)
		}
		reports, _ := s.Restore()
		r := robotState(t, s, "robots/cart-a")
		s.Close()
		if len(reports) != 1 || reports[0].State != tc.state || r.GetState() != tc.state {
			t.Fatalf("restored by %s: %+v, robot %v", tc.build, reports, r.GetState())
		}
		if tc.state == pb.RobotState_ROBOT_STATE_SERVING {
			if reports[0].Differing != changed || !strings.Contains(r.GetStateDetail(), `build "old-build" differ`) {
				t.Errorf("note: %d differing, %q; want %d", reports[0].Differing, r.GetStateDetail(), changed)
			}
		} else if !strings.Contains(r.GetStateDetail(), "diverged") {
			t.Errorf("same build: %q", r.GetStateDetail())
		}
	}
	if changed == 0 {
		t.Fatal("the run has no fixes")
	}
	after, _ := os.ReadFile(journal.SegmentPath(old, "cart-a", 0))
	if len(after) < len(before) || string(after[:len(before)]) != string(before) {
		t.Error("the older build's records were rewritten")
	}
	// The new build wrote a snapshot saying so: the next restart replays
	// only its own outputs and has nothing to note.
	s, _ := New(Options{JournalDir: old, Build: "new-build"})
	reports, _ := s.Restore()
	s.Close()
	if reports[0].State != pb.RobotState_ROBOT_STATE_SERVING || reports[0].Differing != 0 || reports[0].Build != "new-build" {
		t.Errorf("second restart: %+v", reports[0])
	}
}

// TestSecondServerRefused: a second server on the same journal directory
// refuses to start, naming the holder's pid.
func TestSecondServerRefused(t *testing.T) {
	dir := t.TempDir()
	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := New(Options{JournalDir: dir}); err == nil || !strings.Contains(err.Error(), "locked by process "+strconv.Itoa(os.Getpid())) {
		t.Errorf("second server: %v", err)
	}
	s.Close()
	s2, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatalf("after the first closed: %v", err)
	}
	s2.Close()
}

// TestUnreadableSnapshotSkipped: a snapshot this build cannot read (as one
// of another format version) is skipped: the robot is replayed from the
// start and serves, with a note.
func TestUnreadableSnapshotSkipped(t *testing.T) {
	dir := t.TempDir()
	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	samp, cfg := cartRun(13, 2)
	s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	take(s, requests("robots/cart", "", 1, samp[:250]))
	s.Close()
	_, scan, _ := journal.Replay(dir, "cart", journal.ReplayOptions{})
	w, err := journal.Resume(dir, "cart", &scan, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	w.Append(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: 250, State: []byte("a snapshot of format version 99")}}})
	w.Close()

	s, _ = New(Options{JournalDir: dir})
	defer s.Close()
	reports, _ := s.Restore()
	r := robotState(t, s, "robots/cart")
	if len(reports) != 1 || r.GetState() != pb.RobotState_ROBOT_STATE_SERVING || r.GetInputCount() != 250 || !strings.Contains(r.GetStateDetail(), "snapshot at input 250 not restored") {
		t.Errorf("restore past an unreadable snapshot: %+v; robot %v", reports, r)
	}
	assertMemoryIsJournal(t, s, dir, "cart", 250)
}

// TestThisBuild: the build a journal records names something, and its
// architecture (the same source computes other floating-point bits on
// arm64, whose compiler fuses a multiply and an add, than on amd64: a
// journal moved between them is another build's; common practice), and
// CreateRobot records it in the opening.
func TestThisBuild(t *testing.T) {
	if ThisBuild() == "" || !strings.HasSuffix(strings.SplitN(ThisBuild(), "/", 2)[0], " "+runtime.GOARCH) {
		t.Fatalf("ThisBuild is %q, want it to end in the architecture %s", ThisBuild(), runtime.GOARCH)
	}
	dir := t.TempDir()
	s, _ := New(Options{JournalDir: dir})
	_, cfg := cartRun(1, 1)
	s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	s.Close()
	scan, err := journal.Read(dir, "cart", journal.Visitor{})
	if err != nil || scan.Opening.GetBuild() != ThisBuild() {
		t.Errorf("opening build %q (%v), want %q", scan.Opening.GetBuild(), err, ThisBuild())
	}
}

// robotFiles returns the contents of the files in dir whose names start
// with the robot's id and a dot, by name.
func robotFiles(t *testing.T, dir, id string) map[string]string {
	t.Helper()
	ents, err := os.ReadDir(dir)
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]string{}
	for _, e := range ents {
		if strings.HasPrefix(e.Name(), id+".") {
			b, err := os.ReadFile(dir + "/" + e.Name())
			if err != nil {
				t.Fatal(err)
			}
			out[e.Name()] = string(b)
		}
	}
	return out
}

// assertSetAside checks that every file of before is now in after under
// its name with one ".deleted-{ns}" suffix, byte for byte if exact (a
// journal closed in the delete gives its segment's reserve back, so it is
// shorter by zeros), and that after holds nothing else.
func assertSetAside(t *testing.T, before, after map[string]string, exact bool) {
	t.Helper()
	if len(after) != len(before) {
		t.Errorf("%d files before the delete, %d after: %v", len(before), len(after), keys(after))
	}
	for name, b := range before {
		found := false
		for aside, a := range after {
			if rest, ok := strings.CutPrefix(aside, name+journal.DeletedMark); ok && !strings.Contains(rest, ".") {
				found = true
				if exact && a != b {
					t.Errorf("%s set aside as %s with other bytes", name, aside)
				}
			}
		}
		if !found {
			t.Errorf("%s not set aside: %v", name, keys(after))
		}
	}
}

// asideScan writes the files set aside, after, under their own names into
// a directory of their own and replays the robot's journal there.
func asideScan(t *testing.T, after map[string]string, id string) journal.Scan {
	t.Helper()
	back := t.TempDir()
	for aside, a := range after {
		name, _, _ := strings.Cut(aside, journal.DeletedMark)
		if err := os.WriteFile(back+"/"+name, []byte(a), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	_, scan, err := journal.Replay(back, id, journal.ReplayOptions{})
	if err != nil {
		t.Errorf("the journal set aside: %v", err)
	}
	return scan
}

// deleteSetsAside deletes robot id of s and checks that its journal in dir
// is set aside (assertSetAside, not byte for byte) holding inputs inputs.
func deleteSetsAside(t *testing.T, s *Server, dir, id string, inputs int) {
	t.Helper()
	before := robotFiles(t, dir, id)
	if _, err := s.DeleteRobot(context.Background(), &pb.DeleteRobotRequest{Name: RobotName(id)}); err != nil {
		t.Fatalf("delete: %v", err)
	}
	after := robotFiles(t, dir, id)
	assertSetAside(t, before, after, false)
	if scan := asideScan(t, after, id); scan.Pairs != inputs {
		t.Errorf("the journal set aside holds %d inputs, want %d", scan.Pairs, inputs)
	}
}

func keys(m map[string]string) []string {
	var out []string
	for k := range m {
		out = append(out, k)
	}
	slices.Sort(out)
	return out
}

// TestDeleteQuarantined: a robot quarantined at restore is deleted without
// a restart of the service: its journal, the damaged bytes kept aside
// included, is set aside byte for byte, the other robot serves on, and the
// name can be created again, serves, and is what the next restart restores.
func TestDeleteQuarantined(t *testing.T) {
	dir, _ := twoCartsOneGarbled(t)
	cartA := robotFiles(t, dir, "cart-a")

	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	api := stub(t, srv.addr)
	ctx := context.Background()
	before := robotFiles(t, dir, "cart-b")
	damaged := 0
	for name := range before {
		if strings.Contains(name, ".damaged-") {
			damaged++
		}
	}
	if damaged != 1 {
		t.Fatalf("restore kept %d copies of damaged bytes: %v", damaged, keys(before))
	}
	if _, err := api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/cart-b"}); err != nil {
		t.Fatalf("delete of the quarantined robot: %v", err)
	}
	assertSetAside(t, before, robotFiles(t, dir, "cart-b"), true)
	list, err := api.ListRobots(ctx, &pb.ListRobotsRequest{})
	if err != nil || len(list.GetRobots()) != 1 || list.GetRobots()[0].GetName() != "robots/cart-a" {
		t.Fatalf("after the delete: %v %v", err, list)
	}
	samp, cfg := cartRun(9, 2)
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart-b", Config: cfg}); err != nil {
		t.Fatalf("create the name again: %v", err)
	}
	for _, v := range feedStub(t, api, "robots/cart-b", "", 1, samp) {
		if v.GetSequence() == 0 {
			t.Fatalf("the new cart-b refused %v", v)
		}
	}
	srv.stop()

	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	reports, err := s.Restore()
	if err != nil || len(reports) != 2 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING || reports[1].State != pb.RobotState_ROBOT_STATE_SERVING || reports[1].Inputs != len(samp) {
		t.Fatalf("restart: %v %+v; want both serving, cart-b with %d inputs", err, reports, len(samp))
	}
	for name, b := range cartA {
		if a := robotFiles(t, dir, "cart-a")[name]; !strings.HasPrefix(a, b) {
			t.Errorf("cart-a's %s changed", name)
		}
	}
}

// TestCallRefusalValue: ReseedRobot and StartRun say a refusal as a value,
// as ingest does: in their response for an input the robot took
// (REFUSAL_TOO_FAR_AHEAD), and otherwise in the details of the status,
// where refusals with the same code differ (a run start out of order and a
// quarantined robot are both FAILED_PRECONDITION), a request without its
// reseed or run start included. Before, only the reason's text told them
// apart, and a request without its input had no details at all.
func TestCallRefusalValue(t *testing.T) {
	dir, _ := twoCartsOneGarbled(t)
	srv := start(t, testConfig{Options: Options{JournalDir: dir}})
	defer srv.stop()
	api := stub(t, srv.addr)
	ctx := context.Background()
	samp, _ := cartRun(6, 3)
	newest := newestOdometry(samp)
	unit := &pb.Covariance{Dimension: 3, Values: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}}
	reseed := func(robot string, rs *pb.Reseed) (*pb.ReseedRobotResponse, error) {
		return api.ReseedRobot(ctx, &pb.ReseedRobotRequest{Robot: robot, Reseed: rs})
	}
	startRun := func(robot string, rs *pb.RunStart) (*pb.StartRunResponse, error) {
		return api.StartRun(ctx, &pb.StartRunRequest{Robot: robot, RunStart: rs})
	}
	type refusal interface {
		GetSequence() uint64
		GetVerdict() pb.Verdict
		GetRefusal() pb.Refusal
		GetField() string
		GetReason() string
	}
	// detail is the call's response in a refused call's status, with the
	// status's message as its reason.
	detail := func(err error) (refusal, codes.Code) {
		st := status.Convert(err)
		for _, d := range st.Details() {
			if r, ok := d.(refusal); ok {
				if r.GetReason() != st.Message() {
					t.Errorf("the details' reason %q differs from the status message %q", r.GetReason(), st.Message())
				}
				return r, st.Code()
			}
		}
		return nil, st.Code()
	}
	cases := []struct {
		name    string
		call    func() (refusal, error)
		code    codes.Code
		refusal pb.Refusal
		field   string
	}{
		{"reseed quarantined", func() (refusal, error) {
			return reseed("robots/cart-b", &pb.Reseed{StampNs: newest, Pose: &pb.FloorPose{}, Covariance: unit})
		}, codes.FailedPrecondition, pb.Refusal_REFUSAL_QUARANTINED, ""},
		{"run start quarantined", func() (refusal, error) { return startRun("robots/cart-b", &pb.RunStart{BootId: "by-hand"}) },
			codes.FailedPrecondition, pb.Refusal_REFUSAL_QUARANTINED, ""},
		{"run start out of order", func() (refusal, error) { return startRun("robots/cart-a", &pb.RunStart{BootId: "by-hand", Run: 1}) },
			codes.FailedPrecondition, pb.Refusal_REFUSAL_RUN_OUT_OF_ORDER, "run_start.run"},
		{"reseed malformed", func() (refusal, error) {
			return reseed("robots/cart-a", &pb.Reseed{StampNs: newest, Pose: &pb.FloorPose{}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1}}})
		}, codes.InvalidArgument, pb.Refusal_REFUSAL_MALFORMED, "reseed.covariance"},
		{"reseed missing", func() (refusal, error) { return reseed("robots/cart-a", nil) },
			codes.InvalidArgument, pb.Refusal_REFUSAL_MALFORMED, "reseed"},
		{"run start missing", func() (refusal, error) { return startRun("robots/cart-a", nil) },
			codes.InvalidArgument, pb.Refusal_REFUSAL_MALFORMED, "run_start"},
		{"reseed taken, too far ahead", func() (refusal, error) {
			return reseed("robots/cart-a", &pb.Reseed{StampNs: newest + 2e9, Pose: &pb.FloorPose{}, Covariance: unit})
		}, codes.OK, pb.Refusal_REFUSAL_TOO_FAR_AHEAD, ""},
	}
	for _, tc := range cases {
		resp, err := tc.call()
		code := codes.OK
		if err != nil {
			resp, code = detail(err)
		}
		switch {
		case code != tc.code:
			t.Errorf("%s: %v, want %v", tc.name, err, tc.code)
		case resp == nil:
			t.Errorf("%s: %v, with no response in its details", tc.name, err)
		case resp.GetRefusal() != tc.refusal || resp.GetField() != tc.field || resp.GetVerdict() != pb.Verdict_VERDICT_INVALID || (err != nil) != (resp.GetSequence() == 0):
			t.Errorf("%s: %v (%v), want %v, field %q, VERDICT_INVALID, sequence 0 if and only if refused before taken", tc.name, resp, err, tc.refusal, tc.field)
		}
	}
}
