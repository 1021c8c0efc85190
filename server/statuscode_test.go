package server

import (
	"context"
	"testing"

	"google.golang.org/grpc/codes"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// TestStatusCodeNumbers: the numbers convert writes into
// IngestResponse.status_code offline are the gRPC codes the service means.
func TestStatusCodeNumbers(t *testing.T) {
	for _, c := range []struct {
		got  int32
		want codes.Code
	}{
		{convert.CodeOK, codes.OK},
		{convert.CodeInvalidArgument, codes.InvalidArgument},
		{convert.CodeNotFound, codes.NotFound},
		{convert.CodeResourceExhausted, codes.ResourceExhausted},
		{convert.CodeFailedPrecondition, codes.FailedPrecondition},
		{convert.CodeOutOfRange, codes.OutOfRange},
	} {
		if codes.Code(c.got) != c.want {
			t.Errorf("%v is %d in convert", c.want, c.got)
		}
	}
}

// TestStateRefusalCodes: a sample refused for the robot's state rather
// than its own values gets the status code that says so, over the wire:
// a fix stamped past max_hold_ahead_ns and odometry past
// max_odometry_gap_ns OUT_OF_RANGE, a fix with max_held samples already
// held RESOURCE_EXHAUSTED (gRPC's status code guide; common practice).
// The fixes are taken (journaled with their sequence) and refused; the
// odometry is refused before it is taken. The code before answered
// INVALID_ARGUMENT, which says the sample is wrong whatever the robot's
// state.
func TestStateRefusalCodes(t *testing.T) {
	srv := start(t, testConfig{Options: Options{JournalDir: t.TempDir()}})
	defer srv.stop()
	api := dial(t, srv.addr)
	ctx := context.Background()
	samp, cfg := cartRun(41, 2)
	cfg.MaxHeld, cfg.MaxOdometryGapNs = 2, 60e9
	if _, err := api.CreateRobot(ctx, &pb.CreateRobotRequest{RobotId: "cart", Config: cfg}); err != nil {
		t.Fatal(err)
	}
	f, err := openFeed(ctx, api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	defer f.close()
	applyAll(t, f, samp)
	newest := newestOdometry(samp)
	fix := func(stamp int64) *pb.Sample {
		return &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: stamp, SensorId: "camera", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{}},
			Covariance: &pb.Covariance{Dimension: 3, Values: []float64{100, 0, 0, 0, 100, 0, 0, 0, 9}}}}}
	}
	for _, c := range []struct {
		name    string
		sample  *pb.Sample
		verdict pb.Verdict
		code    codes.Code
		refusal pb.Refusal
		taken   bool
	}{
		{"fix past max_hold_ahead_ns", fix(newest + 2e9), pb.Verdict_VERDICT_INVALID, codes.OutOfRange, pb.Refusal_REFUSAL_TOO_FAR_AHEAD, true},
		{"first held", fix(newest + 1e6), pb.Verdict_VERDICT_HELD, codes.OK, pb.Refusal_REFUSAL_UNSPECIFIED, true},
		{"second held", fix(newest + 2e6), pb.Verdict_VERDICT_HELD, codes.OK, pb.Refusal_REFUSAL_UNSPECIFIED, true},
		{"max_held held already", fix(newest + 3e6), pb.Verdict_VERDICT_INVALID, codes.ResourceExhausted, pb.Refusal_REFUSAL_HELD_FULL, true},
		{"odometry past max_odometry_gap_ns", &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StartNs: newest + 61e9, StampNs: newest + 61e9 + 5e6,
			Motion: &pb.OdometrySample_Step{Step: &pb.BodyStep{}}}}}, pb.Verdict_VERDICT_INVALID, codes.OutOfRange, pb.Refusal_REFUSAL_TOO_FAR_AHEAD, false},
	} {
		resp, err := f.apply(c.sample)
		if err != nil {
			t.Fatal(err)
		}
		if resp.GetVerdict() != c.verdict || codes.Code(resp.GetStatusCode()) != c.code || resp.GetRefusal() != c.refusal || (resp.GetSequence() != 0) != c.taken {
			t.Errorf("%s: verdict %v, status %v, refusal %v, sequence %d (%s); want %v, %v, %v, taken %v",
				c.name, resp.GetVerdict(), codes.Code(resp.GetStatusCode()), resp.GetRefusal(), resp.GetSequence(), resp.GetReason(), c.verdict, c.code, c.refusal, c.taken)
		}
	}
}
