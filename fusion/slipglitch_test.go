package fusion

import (
	"math/rand/v2"
	"testing"
)

// TestIMUGlitchAtRest: a robot standing still whose IMU reads one heading
// 0.03 rad off (6 of its standard deviations) shortly before it drives off
// ends 2.5 s of driving as sure of its position as one whose IMU did not
// glitch. The disagreement, over wheels that did not turn, was taken as a
// slip whose factor, matched against steps of no motion, came out at its
// bound and went on into the driving steps: a 95% radius of 0.7 to 2.3 m
// against 0.16 m, and position_uncertain.
func TestIMUGlitchAtRest(t *testing.T) {
	run := func(glitch float64, at int) FusedPose {
		r, err := New(threeWheels())
		if err != nil {
			t.Fatal(err)
		}
		rng := rand.New(rand.NewPCG(1, 2))
		for k := range 2600 {
			ns := int64(k+1) * 5e6
			tr := []float64{0, 0, 0}
			if k >= 2100 { // 0.5 m/s from 10.5 s on
				tr = []float64{0.0025, 0.0025, 0}
			}
			r.AddOdometry(Odometry{StartNs: ns - 5e6, StampNs: ns, TravelM: tr})
			if k%2 == 0 {
				h := 0.3 + 0.005*rng.NormFloat64() // the default IMU heading noise
				if k == at {
					h += glitch
				}
				r.AddHeading(Heading{StampNs: ns - 1e6, HeadingRad: h})
			}
		}
		return r.Pose()
	}
	clean := run(0, 0)
	for _, glitch := range []float64{0.03, -0.03} {
		for _, at := range []int{2080, 2090, 2098} {
			p := run(glitch, at)
			if p.Position95M > 1.05*clean.Position95M || !p.Trusted() {
				t.Errorf("IMU %+.2f rad off %d ms before driving off: 95%% radius %.3f m (%v), %.3f m without", glitch, (2100-at)*5, p.Position95M, p.Distrust, clean.Position95M)
			}
		}
	}
}
