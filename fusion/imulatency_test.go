package fusion_test

import (
	"errors"
	"math"
	"strings"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestIMULatencyEqualsStampShift: an IMU that stamps each heading 40 ms
// after it read it, with imu_latency_ns set to 40 ms, gives the estimate of
// the same run with the headings stamped when read, to 1e-9 (the headings
// arrive in another order among the other inputs, and late inputs equal
// stamp order to about 1e-9: "Design: Time ordering and late
// measurements"; the run has one slip, whose factor the steps after the
// IMU heading that found it take whether they came before the heading or
// after it). Without the setting the run differs by far more.
func TestIMULatencyEqualsStampShift(t *testing.T) {
	run := func(lateNs, configured int64) fusion.FusedPose {
		sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 21, DurationS: 20,
			Errors: fusiontest.Errors{IMUStampLateNs: lateNs}}
		s := fusiontest.New(sc)
		cfg := s.Config()
		cfg.IMULatencyNs = configured
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		for in, ok := s.Next(); ok; in, ok = s.Next() {
			if res := fusiontest.Feed(r, &in); res.Verdict == fusion.VerdictInvalid {
				t.Fatalf("late %d ns: an input refused: %v", lateNs, res.Err)
			}
		}
		return r.Pose()
	}
	diff := func(a, b fusion.FusedPose) float64 {
		d := math.Max(math.Abs(a.Pose.X-b.Pose.X), math.Max(math.Abs(a.Pose.Y-b.Pose.Y), math.Abs(a.Pose.Heading-b.Pose.Heading)))
		for i := range a.Cov {
			d = math.Max(d, math.Abs(a.Cov[i]-b.Cov[i]))
		}
		return d
	}
	base := run(0, 0)
	d, dOff := diff(run(40e6, 40e6), base), diff(run(40e6, 0), base)
	t.Logf("largest difference from the run stamped when read: %.3g with imu_latency_ns, %.3g without", d, dOff)
	if d > 1e-9 {
		t.Errorf("stamped 40 ms late with imu_latency_ns 40 ms: differs from the run stamped when read by %.3g", d)
	}
	if dOff < 1e-6 {
		t.Errorf("stamped 40 ms late without imu_latency_ns: differs by only %.3g, the test cannot tell", dOff)
	}
}

// TestLatencyAtInt64sEdge: a stamp less a latency must stay a stamp. A fix
// or an IMU heading stamped so near int64's least that its latency takes it
// past is malformed, named so, and changes nothing (before, the difference
// wrapped to a stamp some 292 years ahead).
func TestLatencyAtInt64sEdge(t *testing.T) {
	cfg := fusion.Config{IMU: fusion.IMUAbsolute, IMULatencyNs: 5e6,
		Sensors: []fusion.Sensor{{ID: "camera", Kind: fusion.FixPosition, LatencyNs: 20e6, Cov: []float64{1e-4, 0, 0, 1e-4}}}}
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	step := estimator.Step{ForwardM: 0.001}
	r.AddOdometry(fusion.Odometry{StartNs: 0, StampNs: 10e6, Step: &step})
	before := r.Pose()
	for name, res := range map[string]fusion.Result{
		"fix":         r.AddFix(fusion.Fix{StampNs: math.MinInt64 + 1, SensorID: "camera", Kind: fusion.FixPosition}),
		"IMU heading": r.AddHeading(fusion.Heading{StampNs: math.MinInt64 + 1}),
	} {
		if res.Verdict != fusion.VerdictInvalid || !errors.Is(res.Err, fusion.ErrBadSample) || !strings.Contains(res.Err.Error(), "int64's range") {
			t.Errorf("%s stamped at int64's least plus 1: verdict %v, %v", name, res.Verdict, res.Err)
		}
	}
	if after := r.Pose(); after != before {
		t.Errorf("the refused inputs changed the estimate: %+v, was %+v", after, before)
	}
}
