package server

import (
	"context"
	"fmt"
	"runtime"
	"strings"
	"syscall"
	"testing"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// heapMiB returns the live heap after a collection, MiB.
func heapMiB() float64 {
	runtime.GC()
	var m runtime.MemStats
	runtime.ReadMemStats(&m)
	return float64(m.HeapAlloc) / (1 << 20)
}

// limitedCart serves one robot fed a short run; it returns the stub, the
// run and the newest odometry stamp.
func limitedCart(t *testing.T, opt Options) (pb.FusionServiceClient, []*pb.Sample, int64) {
	t.Helper()
	opt.JournalDir = t.TempDir()
	srv := start(t, testConfig{Options: opt, MaxMessageBytes: 1 << 20})
	t.Cleanup(srv.stop)
	api := stub(t, srv.addr)
	samp, cfg := cartRun(12, 4)
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	feedStub(t, api, "robots/cart", "", 1, samp[:600])
	return api, samp, newestOdometry(samp[:600])
}

// TestUnknownSensorIDs: fixes from 10,000 sensor ids the robot's
// configuration does not name are refused (NOT_FOUND, naming sensor_id)
// without adding anything to the robot: its statistics keep their sensors,
// it goes on taking its own samples, and memory stays bounded. (Before
// sensors were configured, every distinct id grew the robot's state.)
func TestUnknownSensorIDs(t *testing.T) {
	api, samp, newest := limitedCart(t, Options{})
	ctx := context.Background()
	before, err := api.GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	heap := heapMiB()
	fixes := make([]*pb.Sample, 10000)
	for i := range fixes {
		fixes[i] = &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: newest - 1e6, SensorId: fmt.Sprintf("camera-%05d", i),
			Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{XM: 0.1, YM: 0}}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}}}}}
	}
	for _, v := range feedStub(t, api, "robots/cart", "", 1000, fixes) {
		if v.GetSequence() != 0 || codes.Code(v.GetStatusCode()) != codes.NotFound || !strings.Contains(v.GetReason(), "sensor_id") {
			t.Fatalf("fix: %v", v)
		}
	}
	after, err := api.GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: "robots/cart"})
	if err != nil {
		t.Fatal(err)
	}
	if n, m := len(after.GetStatistics().GetSensors()), len(before.GetStatistics().GetSensors()); n != m {
		t.Errorf("%d sensors in the statistics, %d before", n, m)
	}
	for _, v := range feedStub(t, api, "robots/cart", "", 20000, samp[600:700]) {
		if v.GetSequence() == 0 {
			t.Fatalf("the robot's own samples refused: %v", v)
		}
	}
	if grown := heapMiB() - heap; grown > 32 {
		t.Errorf("heap grew by %.1f MiB", grown)
	}
}

// TestLongStrings: 64 KiB strings in session_id, sensor_id, landmark_id and
// a pose fix's marker
// are refused INVALID_ARGUMENT naming the field and -max-string-bytes,
// with the field's path in field (before session 29, empty), before the
// robot sees them; the robot is unharmed.
func TestLongStrings(t *testing.T) {
	api, samp, newest := limitedCart(t, Options{})
	long := strings.Repeat("x", 64<<10)
	fix := func(f *pb.Fix) *pb.Sample {
		f.StampNs, f.Covariance = newest-1e6, &pb.Covariance{Dimension: 2, Values: []float64{1, 0, 0, 1}}
		return &pb.Sample{Sample: &pb.Sample_Fix{Fix: f}}
	}
	cases := []struct {
		field   string
		session string
		sample  *pb.Sample
	}{
		{"session_id", long, samp[600]},
		{"sample.fix.sensor_id", "", fix(&pb.Fix{SensorId: long, Measurement: &pb.Fix_Position{Position: &pb.PositionFix{}}})},
		{"sample.fix.landmark.landmark_id", "", fix(&pb.Fix{Measurement: &pb.Fix_Landmark{Landmark: &pb.LandmarkFix{LandmarkId: long}}})},
		{"sample.fix.pose.marker", "", fix(&pb.Fix{SensorId: "camera", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{Marker: long}}})},
	}
	for _, c := range cases {
		v := feedStub(t, api, "robots/cart", c.session, 1, []*pb.Sample{c.sample})[0]
		if codes.Code(v.GetStatusCode()) != codes.InvalidArgument || v.GetSequence() != 0 || !strings.HasPrefix(v.GetReason(), c.field+":") || !strings.Contains(v.GetReason(), "-max-string-bytes") ||
			v.GetField() != c.field {
			t.Errorf("%s of 64 KiB: %v", c.field, v)
		}
	}
	if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: long}); codeOf(err) != codes.InvalidArgument {
		t.Errorf("robot_id of 64 KiB: %v", err)
	}
	r, _ := api.GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
	if r.GetRobot().GetInputCount() != 600 {
		t.Errorf("robot has %d inputs, want 600", r.GetRobot().GetInputCount())
	}
	if v := feedStub(t, api, "robots/cart", "", 601, samp[600:601])[0]; v.GetSequence() != 601 {
		t.Errorf("next sample: %v", v)
	}
}

// TestWatcherLimits: of 10,000 watch streams opened on one robot, 64 are
// served and the rest refused RESOURCE_EXHAUSTED naming
// -max-watchers-per-robot; past -max-watchers in all, another robot's
// watch is refused naming that flag; closed watches free their places.
func TestWatcherLimits(t *testing.T) {
	api, _, _ := limitedCart(t, Options{Limits: Limits{MaxWatchers: 100}})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	heap := heapMiB()
	open := func(robot string) error {
		w, err := api.Watch(ctx, &pb.WatchRequest{Robot: robot})
		if err == nil {
			_, err = w.Recv()
		}
		return err
	}
	served, refused := 0, 0
	for i := 0; i < 10000; i++ {
		switch err := open("robots/cart"); {
		case err == nil:
			served++
		case codeOf(err) == codes.ResourceExhausted && strings.Contains(err.Error(), "-max-watchers-per-robot"):
			refused++
		default:
			t.Fatalf("watch %d: %v", i, err)
		}
	}
	if served != 64 || refused != 10000-64 {
		t.Errorf("%d watches served, %d refused; want 64 and %d", served, refused, 10000-64)
	}
	samp, cfg := cartRun(12, 1)
	api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart-b", Config: cfg})
	feedStub(t, api, "robots/cart-b", "", 1, samp[:10])
	for i := 0; i < 36; i++ {
		if err := open("robots/cart-b"); err != nil {
			t.Fatalf("watch %d of cart-b: %v", i, err)
		}
	}
	if err := open("robots/cart-b"); codeOf(err) != codes.ResourceExhausted || !strings.Contains(err.Error(), "-max-watchers)") {
		t.Errorf("watch past the limit in all: %v", err)
	}
	if grown := heapMiB() - heap; grown > 64 {
		t.Errorf("heap grew by %.1f MiB", grown)
	}
	cancel()
	ctx, cancel = context.WithCancel(context.Background())
	defer cancel()
	var err error
	for deadline := time.Now().Add(5 * time.Second); time.Now().Before(deadline); time.Sleep(10 * time.Millisecond) {
		if err = open("robots/cart"); err == nil {
			break
		}
	}
	if err != nil {
		t.Errorf("watch after the others closed: %v", err)
	}
}

// TestCreateRobotBounds: a configuration past a robot's upper bounds
// (fusion.Config.CheckBounds) is refused at CreateRobot with
// INVALID_ARGUMENT naming the field, and nothing is allocated for it:
// trust.nis_window of two billion allocated 160 GB at creation before.
func TestCreateRobotBounds(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	api := stub(t, srv.addr)
	_, cfg := cartRun(12, 1)
	cfg.Trust = &pb.TrustLimits{NisWindow: 2_000_000_000}
	cfg.WindowNs = 0
	_, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "trust.nis_window") {
		t.Fatalf("nis_window of two billion: %v", err)
	}
	cfg.Trust, cfg.WindowNs = nil, 3_600e9
	_, err = api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "window_ns") {
		t.Fatalf("a window of an hour: %v", err)
	}
	// The smallest float64 is inside (0, 1); its chi-square quantile made
	// fusion.New panic, which ended the service (fusion's
	// TestTinyProbabilities).
	cfg.WindowNs, cfg.GateProbability = 0, 5e-324
	_, err = api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "gate_probability") {
		t.Fatalf("a gate probability of 5e-324: %v", err)
	}
	if list, err := api.ListRobots(context.Background(), &pb.ListRobotsRequest{}); err != nil || len(list.GetRobots()) != 0 {
		t.Errorf("robots after the refusals: %v %v", list.GetRobots(), err)
	}
}

// TestJournalPastBoundsRestores: a journal written before the bounds of a
// new robot existed may hold a configuration past them (here an angle in
// degrees and a wheel in millimetres, fusion.Config.CheckBounds'
// checkUnits): the robot restores and serves with it as written, while
// CreateRobot refuses the same configuration naming the field.
func TestJournalPastBoundsRestores(t *testing.T) {
	dir := t.TempDir()
	_, cfg := cartRun(6, 1)
	cfg.Wheels[len(cfg.Wheels)-1].DirectionRad = 90
	cfg.Wheels[0].YM = 120
	w, err := journal.Create(dir, "cart", &pb.JournalOpening{Robot: RobotName("cart"), Config: cfg, CreateTimeUnixNs: 1}, journal.Options{})
	if err == nil {
		_, err = w.Flush()
	}
	if err != nil {
		t.Fatal(err)
	}
	w.Close()
	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	reports, err := s.Restore()
	if err != nil || len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING {
		t.Fatalf("restore: %+v %v", reports, err)
	}
	r := robotState(t, s, "robots/cart")
	if got := r.GetConfig().GetWheels(); got[len(got)-1].GetDirectionRad() != 90 || got[0].GetYM() != 120 {
		t.Errorf("restored configuration: %v", got)
	}
	_, err = s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart-2", Config: cfg})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "degrees") {
		t.Errorf("CreateRobot of the same configuration: %v", err)
	}
}

// TestIngestStreamLimit: of 1,000 ingest streams opened at once, 50
// (MaxIngestStreams) are served and the rest end RESOURCE_EXHAUSTED naming
// -max-ingest-streams; closed streams free their places. Before, every
// stream was served: 10,000 idle ones took 240 MB of reckond's memory.
func TestIngestStreamLimit(t *testing.T) {
	api, samp, _ := limitedCart(t, Options{Limits: Limits{MaxIngestStreams: 50}})
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	open := func() (pb.FusionService_IngestClient, error) {
		st, err := api.Ingest(ctx)
		if err != nil {
			return nil, err
		}
		// A sample already taken: a served stream answers it again.
		st.Send(&pb.IngestRequest{Robot: "robots/cart", Sample: samp[0]})
		_, err = st.Recv()
		return st, err
	}
	var served []pb.FusionService_IngestClient
	refused := 0
	for i := 0; i < 1000; i++ {
		switch st, err := open(); {
		case err == nil:
			served = append(served, st)
		case codeOf(err) == codes.ResourceExhausted && strings.Contains(err.Error(), "-max-ingest-streams"):
			refused++
		default:
			t.Fatalf("stream %d: %v", i, err)
		}
	}
	if len(served) != 50 || refused != 950 {
		t.Fatalf("%d ingest streams served, %d refused; want 50 and 950", len(served), refused)
	}
	for _, st := range served[:10] {
		st.CloseSend()
		for _, err := st.Recv(); err == nil; _, err = st.Recv() {
		}
	}
	var err error
	for deadline := time.Now().Add(5 * time.Second); time.Now().Before(deadline); time.Sleep(10 * time.Millisecond) {
		if _, err = open(); err == nil {
			break
		}
	}
	if err != nil {
		t.Errorf("a stream after 10 closed: %v", err)
	}
}

// TestConfigIDsPastStringLimit: a configuration naming a sensor or a
// landmark by an id longer than -max-string-bytes (129 bytes at 128) is
// refused at CreateRobot naming the field and the flag. It was created,
// and every fix naming that sensor or landmark was then refused at the
// limit: a robot that could never take one. An id at the limit is taken,
// and so is a fix naming it.
func TestConfigIDsPastStringLimit(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	api := stub(t, srv.addr)
	ctx := context.Background()
	samp, cfg := cartRun(5, 1)
	past, at := strings.Repeat("s", 129), strings.Repeat("s", 128)
	for _, c := range []struct {
		field string
		set   func(c *pb.RobotConfig)
	}{
		{"sensors[0].id", func(c *pb.RobotConfig) { c.Sensors[0].Id = past }},
		{"landmarks[0].id", func(c *pb.RobotConfig) { c.Landmarks = []*pb.Landmark{{Id: past, XM: 3}} }},
	} {
		bad := proto.Clone(cfg).(*pb.RobotConfig)
		c.set(bad)
		_, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "past", Config: bad})
		if codeOf(err) != codes.InvalidArgument || !strings.Contains(err.Error(), c.field) || !strings.Contains(err.Error(), "-max-string-bytes") {
			api.DeleteRobot(ctx, &pb.DeleteRobotRequest{Name: "robots/past"})
			t.Errorf("%s of 129 bytes: %v", c.field, err)
		}
	}
	id := cfg.Sensors[0].GetId()
	cfg.Sensors[0].Id = at
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatalf("a sensor id of 128 bytes: %v", err)
	}
	var fixes int
	for _, s := range samp {
		if f := s.GetFix(); f != nil && f.GetSensorId() == id {
			f.SensorId = at
			fixes++
		}
	}
	taken := 0
	for k, v := range feedStub(t, api, "robots/cart", "", 1, samp) {
		if samp[k].GetFix() != nil && v.GetSequence() > 0 {
			taken++
		}
	}
	if fixes == 0 || taken != fixes {
		t.Errorf("%d of %d fixes naming the 128-byte sensor taken", taken, fixes)
	}
}

// TestCreateRobotJournalErrors: a robot whose journal cannot be made says
// why by its status, not INTERNAL, which says the service is at fault:
// with no file descriptor left (EMFILE: each robot keeps its journal
// open, so -max-robots robots under a low ulimit -n reach it; reckond
// under ulimit -n 300 created 285 of 400) RESOURCE_EXHAUSTED naming
// ulimit -n and -max-robots; in a directory it may not write (EACCES, as
// reckond's own user met a directory made read-only; EROFS)
// FAILED_PRECONDITION saying so. The name is free once the journal can be
// made.
func TestCreateRobotJournalErrors(t *testing.T) {
	for _, c := range []struct {
		errno syscall.Errno
		code  codes.Code
		says  []string
	}{
		{syscall.EMFILE, codes.ResourceExhausted, []string{"ulimit -n", "-max-robots"}},
		{syscall.EACCES, codes.FailedPrecondition, []string{"cannot be written"}},
		{syscall.EROFS, codes.FailedPrecondition, []string{"read-only"}},
	} {
		ffs := faultfs.New(faultfs.NewMem(), nil)
		srv := start(t, testConfig{Options: Options{JournalDir: "/j", FS: ffs}})
		api := stub(t, srv.addr)
		_, cfg := cartRun(6, 1)
		ffs.SetInject(faultfs.From(faultfs.OpCreate, "cart", 0, c.errno))
		_, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg})
		if codeOf(err) != c.code {
			t.Errorf("%v: %v; want %v", c.errno, err, c.code)
		}
		for _, w := range c.says {
			if err == nil || !strings.Contains(err.Error(), w) {
				t.Errorf("%v: %v; want it to say %q", c.errno, err, w)
			}
		}
		ffs.SetInject(nil)
		if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
			t.Errorf("%v, then the journal can be made: %v", c.errno, err)
		}
		srv.stop()
	}
}

// TestListRobotsPageToken: ListRobots pages through the robots in name
// order by next_page_token, and refuses a page token it did not give,
// naming page_token. Before, any string was taken as a place in the name
// order: "garbage" and "\x00" listed from the start, as if no token were
// given.
func TestListRobotsPageToken(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	api := stub(t, srv.addr)
	ctx := context.Background()
	_, cfg := cartRun(7, 1)
	for _, id := range []string{"e", "b", "d", "a", "c"} {
		if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: id, Config: cfg}); err != nil {
			t.Fatal(err)
		}
	}
	var names []string
	req := &pb.ListRobotsRequest{PageSize: 2}
	for pages := 0; pages < 5; pages++ {
		list, err := api.ListRobots(ctx, req)
		if err != nil {
			t.Fatal(err)
		}
		for _, r := range list.GetRobots() {
			names = append(names, r.GetName())
		}
		if req.PageToken = list.GetNextPageToken(); req.PageToken == "" {
			break
		}
	}
	if got := strings.Join(names, " "); got != "robots/a robots/b robots/c robots/d robots/e" {
		t.Errorf("pages of 2 listed %s", got)
	}
	for _, tok := range []string{"garbage", "\x00", "robots/", "robots/B"} {
		_, err := api.ListRobots(ctx, &pb.ListRobotsRequest{PageToken: tok})
		if codeOf(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "page_token") {
			t.Errorf("page token %q: %v", tok, err)
		}
	}
}

// sizedFix returns a request for robot numbered seq whose encoding is
// exactly size bytes: a fix whose sensor id fills it out.
func sizedFix(robot string, seq uint64, size int) *pb.IngestRequest {
	fix := &pb.Fix{StampNs: 1, SensorId: ""}
	req := &pb.IngestRequest{Robot: robot, ClientSequence: seq, Sample: &pb.Sample{Sample: &pb.Sample_Fix{Fix: fix}}}
	n := size - proto.Size(req)
	for n >= 0 {
		fix.SensorId = strings.Repeat("c", n)
		d := proto.Size(req) - size
		if d == 0 {
			return req
		}
		n -= d
	}
	panic(fmt.Sprintf("no request of %d bytes", size))
}

// TestOversizedRequestRefusedAlone: over a real connection, with the
// default -max-message-bytes (64 KiB), an ingest request of 64 KiB + 1
// byte is refused as its own verdict (RESOURCE_EXHAUSTED, REFUSAL_LIMIT,
// its client sequence, the reason naming its size, the limit and the
// flag) and the stream goes on: the samples after it are taken. One of
// exactly 64 KiB passes the size check (and is refused for its sensor id's
// length instead). 300 oversized requests leave the live heap within
// 8 MiB of where it was (they are not kept; 30 MB were sent). A
// CreateRobot past the limit is RESOURCE_EXHAUSTED naming its type, size
// and the limit. Past HardMessageBytes (128 KiB) gRPC ends the stream
// RESOURCE_EXHAUSTED after the verdicts of what came before it. The robot
// holds exactly the samples taken. Before, any message past the limit
// ended the stream, every request in flight after it unanswered.
func TestOversizedRequestRefusedAlone(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	api := dial(t, srv.addr)
	ctx := context.Background()
	samp, cfg := cartRun(14, 2)
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	applyAll(t, f, samp[:10])
	const limit = DefaultMaxMessageBytes
	send := func(size int) *pb.IngestResponse {
		t.Helper()
		seq := f.sent.Add(1)
		if err := f.Send(sizedFix("robots/cart", seq, size)); err != nil {
			t.Fatal(err)
		}
		resp, err := f.Recv()
		if err != nil || resp.GetClientSequence() != seq {
			t.Fatalf("request of %d bytes: %v, %v; want the verdict of client sequence %d", size, resp, err, seq)
		}
		return resp
	}
	over := send(limit + 1)
	if over.GetVerdict() != pb.Verdict_VERDICT_INVALID || over.GetSequence() != 0 || codes.Code(over.GetStatusCode()) != codes.ResourceExhausted ||
		over.GetRefusal() != pb.Refusal_REFUSAL_LIMIT || !strings.Contains(over.GetReason(), fmt.Sprintf("%d bytes exceeds the limit of %d (-max-message-bytes)", limit+1, limit)) {
		t.Errorf("request of %d bytes: %v; want RESOURCE_EXHAUSTED, REFUSAL_LIMIT naming its size, the limit and the flag", limit+1, over)
	}
	at := send(limit)
	if codes.Code(at.GetStatusCode()) != codes.InvalidArgument || at.GetField() != "sample.fix.sensor_id" {
		t.Errorf("request of exactly %d bytes: %v; want it past the size check, refused for its sensor id", limit, at)
	}
	applyAll(t, f, samp[10:20])

	heap := heapMiB()
	for k := 0; k < 300; k++ {
		if resp := send(100 << 10); resp.GetRefusal() != pb.Refusal_REFUSAL_LIMIT {
			t.Fatalf("request of 100 KiB: %v", resp)
		}
	}
	grew := heapMiB() - heap
	if grew > 8 {
		t.Errorf("the live heap grew by %.1f MiB over 300 oversized requests", grew)
	}
	t.Logf("live heap after 300 requests of 100 KiB: %+.2f MiB", grew)

	_, err = api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: strings.Repeat("r", limit), Config: cfg})
	if s := status.Convert(err); s.Code() != codes.ResourceExhausted ||
		!strings.Contains(s.Message(), "reckon.v1.CreateRobotRequest of ") || !strings.Contains(s.Message(), fmt.Sprintf("exceeds the limit of %d (-max-message-bytes)", limit)) {
		t.Errorf("CreateRobot past the limit: %v", err)
	}

	if _, err := f.apply(samp[20]); err != nil {
		t.Fatal(err)
	}
	if err := f.Send(sizedFix("robots/cart", f.sent.Add(1), HardMessageBytes(limit)+1)); err != nil {
		t.Fatal(err)
	}
	if resp, err := f.Recv(); status.Code(err) != codes.ResourceExhausted {
		t.Errorf("past %d bytes: %v, %v; want the stream ended RESOURCE_EXHAUSTED", HardMessageBytes(limit), resp, err)
	}
	r, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
	if err != nil || r.GetRobot().GetInputCount() != 21 {
		t.Errorf("robot holds %d inputs (%v), want the 21 samples taken", r.GetRobot().GetInputCount(), err)
	}
}

// TestRetryPastLoweredLimits: a client resends, with its session id and
// client sequences, samples the service took before a restart that lowered
// a limit they are past: -max-message-bytes below their size, or
// -max-string-bytes below their session id's length. Each is answered with
// its original verdict and not applied again, as any retry of a sample
// taken (IngestRequest.session_id); the session's next sample, not taken
// before, is refused REFUSAL_LIMIT, and so is a resend under another
// session id. Before, every one was refused REFUSAL_LIMIT (the limits were
// checked before the session): the client was told that samples the robot
// holds were not taken.
func TestRetryPastLoweredLimits(t *testing.T) {
	const sid, other, n = "c41d7e09", "another-session", 20
	samp, cfg := cartRun(14, 2)
	// The smallest of the requests resent, less a byte.
	smallest := 1 << 20
	for k, s := range samp[:n+1] {
		smallest = min(smallest, proto.Size(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(k + 1), Sample: s, SessionId: sid})-1)
	}
	for _, tc := range []struct {
		name  string
		lower testConfig
		code  codes.Code
	}{
		{"max-message-bytes", testConfig{MaxMessageBytes: smallest}, codes.ResourceExhausted},
		{"max-string-bytes", testConfig{Options: Options{Limits: Limits{MaxStringBytes: len(sid) - 1}}}, codes.InvalidArgument},
	} {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			srv := start(t, testConfig{Options: Options{JournalDir: dir}})
			api := stub(t, srv.addr)
			if _, err := api.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
				t.Fatal(err)
			}
			first := feedStub(t, api, "robots/cart", sid, 1, samp[:n])
			srv.stop()
			tc.lower.JournalDir = dir
			srv = start(t, tc.lower)
			defer srv.stop()
			api = stub(t, srv.addr)
			again := feedStub(t, api, "robots/cart", sid, 1, samp[:n+1])
			for k, v := range again[:n] {
				if !proto.Equal(v, first[k]) {
					t.Errorf("retry of %d: %v, want the original %v", k+1, v, first[k])
				}
			}
			for _, v := range []*pb.IngestResponse{again[n], feedStub(t, api, "robots/cart", other, 1, samp[:1])[0]} {
				if v.GetRefusal() != pb.Refusal_REFUSAL_LIMIT || codes.Code(v.GetStatusCode()) != tc.code || v.GetSequence() != 0 {
					t.Errorf("a request past the limit not taken before: %v, want %v, REFUSAL_LIMIT", v, tc.code)
				}
			}
			r, err := api.GetRobot(context.Background(), &pb.GetRobotRequest{Name: "robots/cart"})
			if err != nil || r.GetRobot().GetInputCount() != n {
				t.Errorf("robot holds %d inputs (%v), want the %d taken before the restart", r.GetRobot().GetInputCount(), err, n)
			}
		})
	}
}
