package fusion_test

import (
	"math"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// TestIMUOffsetWalkPerRadian: noise.imu_offset_var_rad2_per_rad adds to
// the IMU offset's variance in proportion to the turn, and nothing else
// does but the walk per second: over a step that turns 0.5 rad in 0.1 s,
// the offset's variance grows by exactly q 0.5 + q_s 0.1 (a random walk's
// variance adds over its increments: common practice), and not at all
// with the robot standing still.
func TestIMUOffsetWalkPerRadian(t *testing.T) {
	const q, qs = 1e-4, 1e-7
	grow := func(turn float64) float64 {
		cfg := fusion.Config{IMU: fusion.IMUAbsolute, Noise: fusion.Noise{IMUOffsetVarRad2PerRad: q, IMUOffsetVarRad2PerS: qs}}
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		step := func(t0, t1 int64, s estimator.Step) {
			if res := r.AddOdometry(fusion.Odometry{StartNs: t0, StampNs: t1, Step: &s}); res.Verdict != fusion.VerdictApplied {
				t.Fatalf("odometry: %v", res.Err)
			}
		}
		step(0, 10e6, estimator.Step{})
		if res := r.AddHeading(fusion.Heading{StampNs: 10e6, HeadingRad: 0.1}); res.Verdict != fusion.VerdictApplied {
			t.Fatalf("heading: %v", res.Err)
		}
		before := r.Pose().IMUOffsetVarRad2
		step(10e6, 110e6, estimator.Step{TurnRad: turn})
		return r.Pose().IMUOffsetVarRad2 - before
	}
	for _, turn := range []float64{0.5, -0.5, 0} {
		got, want := grow(turn), q*math.Abs(turn)+qs*0.1
		if math.Abs(got-want) > 1e-15 { // float64 rounding of variances near 1e-3
			t.Errorf("turn %v rad: offset variance grew by %.6g, want %.6g", turn, got, want)
		}
	}
}
