package server

import (
	"context"
	"io"
	"math"
	"os"
	"strings"
	"testing"

	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// TestBadInputOverTheWire: bad samples get the right status code and a
// message naming the field; the robot and its journal are unchanged.
func TestBadInputOverTheWire(t *testing.T) {
	dir := t.TempDir()
	srv := start(t, testConfig{Options: Options{JournalDir: dir}, MaxMessageBytes: 16 << 10})
	defer srv.stop()
	c := dial(t, srv.addr)
	ctx := context.Background()
	samp, _, cfg := samples(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 9, DurationS: 2})
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	sess, _ := openFeed(ctx, c, "robots/cart")
	applyAll(t, sess, samp)
	newest := newestOdometry(samp)
	sess.close()
	odo := func(start, stamp int64, travel ...float64) *pb.Sample {
		return &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StartNs: start, StampNs: stamp,
			Motion: &pb.OdometrySample_Travel{Travel: &pb.WheelTravel{TravelM: travel}}}}}
	}
	fix := func(cov *pb.Covariance, x float64) *pb.Sample {
		return &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: newest - 50e6, SensorId: "camera",
			Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{XM: x, YM: 0}}, Covariance: cov}}}
	}
	cov3 := func(v ...float64) *pb.Covariance { return &pb.Covariance{Dimension: 3, Values: v} }
	good := cov3(1e-3, 0, 0, 0, 1e-3, 0, 0, 0, 1e-3)
	cases := []struct {
		name   string
		robot  string
		sample *pb.Sample
		code   codes.Code
		field  string
	}{
		{"NaN travel", "robots/cart", odo(newest, newest+5e6, math.NaN(), 0, 0), codes.InvalidArgument, "travel_m"},
		{"infinite fix", "robots/cart", fix(good, math.Inf(1)), codes.InvalidArgument, "sample.fix"},
		{"covariance size", "robots/cart", fix(cov3(1, 0, 0, 1), 0), codes.InvalidArgument, "sample.fix.covariance"},
		{"covariance dimension", "robots/cart", fix(&pb.Covariance{Dimension: 2, Values: []float64{1, 0, 0, 1}}, 0), codes.InvalidArgument, "sample.fix.covariance: dimension 2, want 3"},
		{"covariance not positive definite", "robots/cart", fix(cov3(1, 2, 0, 2, 1, 0, 0, 0, 1), 0), codes.InvalidArgument, "sample.fix.covariance"},
		{"unknown robot", "robots/tractor", odo(newest, newest+5e6, 0, 0, 0), codes.NotFound, "robot"},
		{"bad robot name", "tractor", odo(newest, newest+5e6, 0, 0, 0), codes.InvalidArgument, "robot"},
		{"upper-case robot id", "robots/Cart", odo(newest, newest+5e6, 0, 0, 0), codes.InvalidArgument, "robot: \"robots/Cart\" is not a robot name: robots/ and an id of 1 to 63 lower-case letters"},
		{"stamp backwards", "robots/cart", odo(newest-20e6, newest-10e6, 0, 0, 0), codes.OutOfRange, "stamp_ns"},
		{"no motion", "robots/cart", &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StampNs: newest + 5e6}}}, codes.InvalidArgument, "sample.odometry"},
		{"empty sample", "robots/cart", &pb.Sample{}, codes.InvalidArgument, "sample"},
		{"wrong wheel count", "robots/cart", odo(newest, newest+5e6, 0.001), codes.InvalidArgument, "travel_m has 1 entries for 3 wheels"},
		{"unknown landmark", "robots/cart", &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: newest - 50e6,
			Measurement: &pb.Fix_Landmark{Landmark: &pb.LandmarkFix{LandmarkId: "post-x9", RangeM: proto.Float64(2)}}, Covariance: &pb.Covariance{Dimension: 1, Values: []float64{0.01}}}}}, codes.NotFound, "landmark_id"},
	}
	journalSize := func() int64 {
		st, err := os.Stat(journal.SegmentPath(dir, "cart", 0))
		if err != nil {
			t.Fatal(err)
		}
		return st.Size()
	}
	robotNow := func() (*pb.Robot, *pb.FusedPose) {
		r, err := c.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"})
		if err != nil {
			t.Fatal(err)
		}
		p, err := c.GetPoseAt(ctx, &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: newest})
		if err != nil {
			t.Fatal(err)
		}
		return r.GetRobot(), p.GetPose()
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			size := journalSize()
			r0, p0 := robotNow()
			s2, err := openFeed(ctx, c, tc.robot)
			if err != nil {
				t.Fatal(err)
			}
			resp, err := s2.apply(tc.sample)
			if err != nil {
				t.Fatal(err)
			}
			if codes.Code(resp.GetStatusCode()) != tc.code || resp.GetVerdict() != pb.Verdict_VERDICT_INVALID || !strings.Contains(resp.GetReason(), tc.field) {
				t.Errorf("code %v verdict %v reason %q; want %v naming %q", codes.Code(resp.GetStatusCode()), resp.GetVerdict(), resp.GetReason(), tc.code, tc.field)
			}
			// A sample for no robot is refused by its status code alone
			// (refuse): a malformed name is no limit.
			if tc.field == "robot" && resp.GetRefusal() != pb.Refusal_REFUSAL_UNSPECIFIED {
				t.Errorf("refusal %v for a sample to %q, want none", resp.GetRefusal(), tc.robot)
			}
			// The stream stays usable after a bad sample.
			if _, err := s2.apply(&pb.Sample{}); err != nil {
				t.Errorf("stream ended after a bad sample: %v", err)
			}
			s2.close()
			r1, p1 := robotNow()
			if !proto.Equal(r0, r1) || !proto.Equal(p0, p1) {
				t.Errorf("robot changed: %v -> %v", r0.GetInputCount(), r1.GetInputCount())
			}
			if journalSize() != size {
				t.Errorf("journal grew from %d to %d bytes", size, journalSize())
			}
		})
	}
	// An oversized message ends the stream with RESOURCE_EXHAUSTED and
	// changes nothing.
	size := journalSize()
	r0, _ := robotNow()
	big, _ := openFeed(ctx, c, "robots/cart")
	_, err := big.apply(odo(newest, newest+5e6, make([]float64, 5000)...))
	if status.Code(err) != codes.ResourceExhausted {
		t.Errorf("oversized message: %v", err)
	}
	if r1, _ := robotNow(); !proto.Equal(r0, r1) || journalSize() != size {
		t.Errorf("oversized message changed the robot or journal")
	}
	// Unary calls name the field too.
	_, err = c.ReseedRobot(ctx, &pb.ReseedRobotRequest{Robot: "robots/cart", Reseed: &pb.Reseed{StampNs: newest, Pose: &pb.FloorPose{XM: math.NaN()}, Covariance: good}})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "pose") {
		t.Errorf("ReseedRobot NaN: %v", err)
	}
	_, err = c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "Bad_Name", Config: cfg})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "robot_id") {
		t.Errorf("bad robot id: %v", err)
	}
	bad := proto.Clone(cfg).(*pb.RobotConfig)
	bad.Wheels[1].CountsPerM = -3
	_, err = c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart2", Config: bad})
	if status.Code(err) != codes.InvalidArgument || !strings.Contains(err.Error(), "wheels[1].counts_per_m") {
		t.Errorf("bad config: %v", err)
	}
	if _, err := c.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); status.Code(err) != codes.AlreadyExists {
		t.Errorf("duplicate robot: %v", err)
	}
	if _, err := c.GetStatistics(ctx, &pb.GetStatisticsRequest{Robot: "robots/none"}); status.Code(err) != codes.NotFound {
		t.Errorf("statistics of an unknown robot: %v", err)
	}
}

// TestReseedRPCNamesField: ReseedRobot refuses a bad re-seed with a status
// whose message starts with the request's own field (ReseedRobotRequest
// has no sample: the message began "bad sample: sample.reseed" before).
func TestReseedRPCNamesField(t *testing.T) {
	c := serveCart(t, testConfig{})
	ctx := context.Background()
	cases := []struct {
		name   string
		robot  string
		reseed *pb.Reseed
		code   codes.Code
		field  string
	}{
		{"missing", "robots/cart", nil, codes.InvalidArgument, "reseed"},
		{"no pose", "robots/cart", &pb.Reseed{}, codes.InvalidArgument, "reseed.pose"},
		{"covariance size", "robots/cart", &pb.Reseed{Pose: &pb.FloorPose{}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1}}}, codes.InvalidArgument, "reseed.covariance"},
		{"unknown robot", "robots/tractor", &pb.Reseed{Pose: &pb.FloorPose{}}, codes.NotFound, "robot"},
	}
	for _, tc := range cases {
		_, err := c.ReseedRobot(ctx, &pb.ReseedRobotRequest{Robot: tc.robot, Reseed: tc.reseed})
		if st := status.Convert(err); st.Code() != tc.code || !strings.HasPrefix(st.Message(), tc.field+":") {
			t.Errorf("%s: %v, want %v starting with %s", tc.name, err, tc.code, tc.field)
		}
	}
}

// TestPoseAtWithoutOdometry: GetPoseAt of a robot that has taken no
// odometry is OUT_OF_RANGE saying so, at any stamp; before, the message
// said the stamp was "before the history window", also for a stamp after
// every input (a client asking for "now").
func TestPoseAtWithoutOdometry(t *testing.T) {
	c := serveCart(t, testConfig{})
	for _, stamp := range []int64{-1, 0, 1e9} {
		_, err := c.GetPoseAt(context.Background(), &pb.GetPoseAtRequest{Robot: "robots/cart", StampNs: stamp})
		if st := status.Convert(err); st.Code() != codes.OutOfRange || !strings.Contains(st.Message(), "no odometry") || strings.Contains(st.Message(), "before the history window") {
			t.Errorf("GetPoseAt(%d) without odometry: %v, want OUT_OF_RANGE saying the robot has no odometry", stamp, err)
		}
	}
}

// TestReseedTooFarAheadReplays: a re-seed stamped past max_hold_ahead_ns
// is refused after the robot took it, as a fix stamped so is: it has a
// sequence number and is journaled, and changes nothing else. That is
// harmless: the journal replays it refused again (every output equal), a
// restart restores the same pose and sequence with no note of outputs
// that differ, and the inputs after it keep their numbers.
func TestReseedTooFarAheadReplays(t *testing.T) {
	dir := t.TempDir()
	s, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	samp, cfg := cartRun(41, 2)
	if _, err := s.CreateRobot(context.Background(), &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	for _, v := range take(s, requests("robots/cart", "", 1, samp)) {
		if v.GetSequence() == 0 {
			t.Fatalf("a sample of the run refused: %v", v)
		}
	}
	newest := newestOdometry(samp)
	before, seq := memoryPose(s)
	resp, err := s.ReseedRobot(context.Background(), &pb.ReseedRobotRequest{Robot: "robots/cart", Reseed: &pb.Reseed{StampNs: newest + 2e9,
		Pose: &pb.FloorPose{XM: 5, YM: 1}, Covariance: &pb.Covariance{Dimension: 3, Values: []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.01}}}})
	if err != nil || resp.GetVerdict() != pb.Verdict_VERDICT_INVALID || resp.GetSequence() != seq+1 || !strings.Contains(resp.GetReason(), "max_hold_ahead_ns") {
		t.Fatalf("reseed 2 s ahead: %v %v, want invalid with sequence %d naming max_hold_ahead_ns", resp, err, seq+1)
	}
	if after, _ := memoryPose(s); !proto.Equal(after, before) {
		t.Errorf("the refused reseed moved the robot from %v to %v", before, after)
	}
	more, _ := cartRun(41, 3)
	if v := take(s, requests("robots/cart", "", 1000, more[len(samp):len(samp)+1]))[0]; v.GetSequence() != seq+2 {
		t.Errorf("the input after the refused reseed: sequence %d, want %d", v.GetSequence(), seq+2)
	}
	want, wantSeq := memoryPose(s)
	s.Close()

	if got, gotSeq := offline(t, dir, "cart"); gotSeq != wantSeq || !proto.Equal(got, want) {
		t.Errorf("offline replay: input %d, pose %v; served %d, %v", gotSeq, got, wantSeq, want)
	}
	s, err = New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	reports, err := s.Restore()
	if err != nil || len(reports) != 1 || reports[0].State != pb.RobotState_ROBOT_STATE_SERVING || reports[0].Detail != "" {
		t.Fatalf("restore: %v %+v", err, reports)
	}
	if got, gotSeq := memoryPose(s); gotSeq != wantSeq || !proto.Equal(got, want) {
		t.Errorf("restored at input %d, pose %v; before the restart %d, %v", gotSeq, got, wantSeq, want)
	}
}

// rawCodec sends requests as the bytes given, so that a test can send
// what no protobuf encoder makes, and decodes responses with proto.
type rawCodec struct{}

func (rawCodec) Marshal(v any) ([]byte, error)      { return *v.(*[]byte), nil }
func (rawCodec) Unmarshal(data []byte, v any) error { return proto.Unmarshal(data, v.(proto.Message)) }
func (rawCodec) Name() string                       { return "proto" }

// TestMalformedRequestIsItsVerdict: a request whose bytes are not an
// IngestRequest (a robot name that is not UTF-8, which a C encoder on a
// robot's controller sends as readily as any, or a field cut short) is
// answered as its own verdict, INVALID_ARGUMENT with REFUSAL_MALFORMED
// and its client sequence, and the samples after it on the stream are
// taken. Before, the codec's error ended the whole stream with INTERNAL
// ("grpc: failed to unmarshal the received message"), against the
// contract that a bad sample does not end it.
func TestMalformedRequestIsItsVerdict(t *testing.T) {
	conn, api, samp := serveCartOn(t, 4, 1)
	ctx := context.Background()
	good := func(cs uint64, s *pb.Sample) []byte {
		b, err := proto.Marshal(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: cs, Sample: s})
		if err != nil {
			t.Fatal(err)
		}
		return b
	}
	notUTF8, _ := proto.Marshal(&pb.IngestRequest{ClientSequence: 2, Sample: samp[1]})
	notUTF8 = append(notUTF8, 0x0a, 3, 'r', 0xff, 0xfe) // robot: "r\xff\xfe"
	cut := good(3, samp[1])
	cut = cut[:len(cut)-1] // the sample's last field cut short
	st, err := conn.NewStream(ctx, &grpc.StreamDesc{ServerStreams: true, ClientStreams: true}, "/reckon.v1.FusionService/Ingest", grpc.ForceCodec(rawCodec{}))
	if err != nil {
		t.Fatal(err)
	}
	for _, b := range [][]byte{good(1, samp[0]), notUTF8, cut, good(4, samp[1])} {
		if err := st.SendMsg(&b); err != nil {
			t.Fatal(err)
		}
	}
	st.CloseSend()
	var got []*pb.IngestResponse
	for {
		resp := &pb.IngestResponse{}
		if err := st.RecvMsg(resp); err != nil {
			if err != io.EOF {
				t.Fatalf("the stream ended with %v after %d verdicts", err, len(got))
			}
			break
		}
		if !resolutionOnly(resp) {
			got = append(got, resp)
		}
	}
	if len(got) != 4 {
		t.Fatalf("%d verdicts, want 4: %v", len(got), got)
	}
	for k, want := range []string{"UTF-8", "cannot parse"} {
		r := got[k+1]
		if r.GetClientSequence() != uint64(k+2) || r.GetSequence() != 0 || r.GetVerdict() != pb.Verdict_VERDICT_INVALID ||
			codes.Code(r.GetStatusCode()) != codes.InvalidArgument || r.GetRefusal() != pb.Refusal_REFUSAL_MALFORMED ||
			!strings.Contains(r.GetReason(), "not a valid reckon.v1.IngestRequest") || !strings.Contains(r.GetReason(), want) {
			t.Errorf("malformed request %d: %v", k+2, r)
		}
	}
	if got[0].GetSequence() != 1 || got[3].GetSequence() != 2 || got[3].GetClientSequence() != 4 {
		t.Errorf("the good requests around them: %v, %v", got[0], got[3])
	}
	if rb, err := api.GetRobot(ctx, &pb.GetRobotRequest{Name: "robots/cart"}); err != nil || rb.GetRobot().GetInputCount() != 2 {
		t.Errorf("robot after: %v %v", rb.GetRobot(), err)
	}
}
