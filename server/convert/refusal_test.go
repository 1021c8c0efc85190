package convert

import (
	"math"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
)

// TestRefusalsAsValues: every way a sample is refused comes back with its
// refusal as a value and, where one field was wrong, that field's path, so
// that clients and review group refusals without reading the reason text.
func TestRefusalsAsValues(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 3, DurationS: 2}
	r, err := fusion.New(fusiontest.New(sc).Config())
	if err != nil {
		t.Fatal(err)
	}
	sim := fusiontest.New(sc)
	var newest int64
	for in, ok := sim.Next(); ok; in, ok = sim.Next() {
		if in.Odometry != nil {
			Take(r, OdometryToProto(in.Odometry), 0)
			newest = in.Odometry.StampNs
		}
	}
	cov3 := &pb.Covariance{Dimension: 3, Values: []float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 1e-4}}
	fix := func(f *pb.Fix) *pb.Sample { return &pb.Sample{Sample: &pb.Sample_Fix{Fix: f}} }
	cases := []struct {
		name    string
		sample  *pb.Sample
		refusal pb.Refusal
		field   string
	}{
		{"unknown sensor", fix(&pb.Fix{StampNs: newest, SensorId: "lidar", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{}}, Covariance: cov3}),
			pb.Refusal_REFUSAL_UNKNOWN_SENSOR, "sample.fix"},
		{"too old", fix(&pb.Fix{StampNs: 1, SensorId: "camera", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{}}, Covariance: cov3}),
			pb.Refusal_REFUSAL_TOO_OLD, ""},
		{"malformed covariance", fix(&pb.Fix{StampNs: newest, SensorId: "camera", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{}},
			Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1, 2, 0, 2, 1, 0, 0, 0, 1}}}),
			pb.Refusal_REFUSAL_MALFORMED, "sample.fix.covariance"},
		{"time backwards", &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StampNs: newest - 1e6, StartNs: newest - 2e6,
			Motion: &pb.OdometrySample_Step{Step: &pb.BodyStep{}}}}}, pb.Refusal_REFUSAL_TIME_BACKWARDS, "sample.odometry"},
		{"run start without boot id", &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{}}}, pb.Refusal_REFUSAL_MALFORMED, "sample.run_start.boot_id"},
		{"run start going back", &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: "b", Run: 1}}}, pb.Refusal_REFUSAL_RUN_OUT_OF_ORDER, "sample.run_start.run"},
		{"run start covariance without pose", &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: "b", Covariance: cov3}}}, pb.Refusal_REFUSAL_MALFORMED, "sample.run_start.pose"},
		// A reseed's and a run start's pose and covariance name themselves
		// (until session 25 a reseed's named only "sample.reseed", and a
		// run start's covariance "sample.run_start.pose").
		{"reseed pose not finite", &pb.Sample{Sample: &pb.Sample_Reseed{Reseed: &pb.Reseed{StampNs: newest, Pose: &pb.FloorPose{XM: math.NaN()}, Covariance: cov3}}},
			pb.Refusal_REFUSAL_MALFORMED, "sample.reseed.pose"},
		{"reseed covariance not positive definite", &pb.Sample{Sample: &pb.Sample_Reseed{Reseed: &pb.Reseed{StampNs: newest, Pose: &pb.FloorPose{},
			Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1, 2, 0, 2, 1, 0, 0, 0, 1}}}}}, pb.Refusal_REFUSAL_MALFORMED, "sample.reseed.covariance"},
		{"run start covariance not positive definite", &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: "b", Pose: &pb.FloorPose{},
			Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1, 2, 0, 2, 1, 0, 0, 0, 1}}}}}, pb.Refusal_REFUSAL_MALFORMED, "sample.run_start.covariance"},
		{"applied", fix(&pb.Fix{StampNs: newest, SensorId: "camera", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{}},
			Covariance: &pb.Covariance{Dimension: 3, Values: []float64{100, 0, 0, 0, 100, 0, 0, 0, 9}}}), pb.Refusal_REFUSAL_UNSPECIFIED, ""},
		{"the same fix again", fix(&pb.Fix{StampNs: newest, SensorId: "camera", Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{}},
			Covariance: &pb.Covariance{Dimension: 3, Values: []float64{100, 0, 0, 0, 100, 0, 0, 0, 9}}}), pb.Refusal_REFUSAL_REPEATED, ""},
	}
	for _, c := range cases {
		resp, _ := Take(r, c.sample, 0)
		if resp.GetRefusal() != c.refusal || resp.GetField() != c.field {
			t.Errorf("%s: refusal %v, field %q (%s); want %v, %q", c.name, resp.GetRefusal(), resp.GetField(), resp.GetReason(), c.refusal, c.field)
		}
		if c.refusal != pb.Refusal_REFUSAL_UNSPECIFIED && RefusalName(resp.GetRefusal()) == "" {
			t.Errorf("%s: no label", c.name)
		}
	}
}
