package fusion_test

import (
	"math"
	"testing"

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
