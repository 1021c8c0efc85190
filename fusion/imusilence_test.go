package fusion_test

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// spinRun drives a three-wheel cart (two parallel wheels 0.24 m apart and
// a lateral one 0.08 m behind, the wheels' travels drawn with the
// configured variance per metre) spinning in place at rate rad/s for durS
// seconds, odometry at 200 Hz, an absolute IMU at 100 Hz (the default
// 5 mrad) silent from fromS to toS seconds, and returns the slip events
// whose chi-square is past far (and logs them), the slip events in all,
// and the largest pose NEES of the reported estimate after the silence.
func spinRun(t *testing.T, seed uint64, cfg fusion.Config, rate, durS, fromS, toS, far float64) (farSlips, slips int, worst float64) {
	t.Helper()
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(seed, 29))
	const dt = 0.005
	wheels := cfg.Wheels
	imuStd := math.Sqrt(fusion.DefaultNoise().IMUHeadingVarRad2)
	zero := rng.Float64()*2*math.Pi - math.Pi
	var th float64
	travel := make([]float64, len(wheels))
	for k := 1; float64(k)*dt <= durS; k++ {
		turn := rate * dt
		th += turn
		for i, w := range wheels {
			// A wheel at (px, py) rolling along phi reads
			// (px sin(phi) - py cos(phi)) dth in a spin (DEVELOPERS.md,
			// "Design: Motion prediction").
			d := (w.XM*math.Sin(w.DirectionRad) - w.YM*math.Cos(w.DirectionRad)) * turn
			travel[i] = d + math.Sqrt(cfg.Noise.WheelVarM2PerM*math.Abs(d))*rng.NormFloat64()
		}
		t1 := int64(k) * 5e6
		res := r.AddOdometry(fusion.Odometry{StartNs: t1 - 5e6, StampNs: t1, TravelM: travel})
		if res.Verdict != fusion.VerdictApplied {
			t.Fatalf("odometry at %d: %v %v", k, res.Verdict, res.Err)
		}
		events := res.Events
		at := float64(k) * dt
		if k%2 == 0 && (at < fromS || at >= toS) {
			z := estimator.Wrap(th + zero + imuStd*rng.NormFloat64())
			res := r.AddHeading(fusion.Heading{StampNs: t1, HeadingRad: z})
			if res.Verdict != fusion.VerdictApplied {
				t.Fatalf("heading at %d: %v %v", k, res.Verdict, res.Err)
			}
			events = append(events, res.Events...)
		}
		for _, e := range events {
			if e.Kind == fusion.EventSlipSuspected {
				slips++
				if e.Value > far {
					farSlips++
					t.Logf("%.3f s: %s", at, e.Detail)
				}
			}
		}
		if at >= toS {
			worst = max(worst, poseNEES(t, r.Pose(), estimator.Pose{Heading: estimator.Wrap(th)}))
		}
	}
	return farSlips, slips, worst
}

// spinConfig is the cart of spinRun with an absolute IMU and a history
// window of windowNs.
func spinConfig(windowNs int64) fusion.Config {
	return fusion.Config{
		Wheels: []fusion.Wheel{{YM: 0.12}, {YM: -0.12}, {XM: -0.08, DirectionRad: math.Pi / 2}},
		IMU:    fusion.IMUAbsolute, Noise: fusion.DefaultNoise(), WindowNs: windowNs,
	}
}

// TestSlipComparisonIMUSilence: a cart spinning in place at 2 rad/s whose
// IMU is silent for 2, 3 and 4 s (a USB IMU reconnecting; turns of 4, 6
// and 8 rad) with a history window of 5 s, so that the slip comparison's
// interval spans the silence, raises no slip event whose chi-square is
// past the 1-dof chi-square's 1 - 1e-9 quantile, which an honest
// comparison passes once in 1e9 tests (the comparison's own false alarms,
// at its gate, about 4 a minute, are allowed), and its pose stays inside
// its 99.9% region (the 3-dof chi-square's 0.999 quantile; both from gonum
// stat/distuv) at every sample after the silence; and so does one spinning
// at 5 rad/s with its IMU reading throughout, whose long comparison's
// 0.8 s turn 4 rad. The IMU's turn over a comparison was the difference of
// two wrapped headings, which lost the whole turns of one through more
// than half a turn: the wheels' 6.5 rad against the IMU's 0.18 rad was a
// disagreement of a whole turn, chi-square 5e4, taken for a slip.
func TestSlipComparisonIMUSilence(t *testing.T) {
	limit := distuv.ChiSquared{K: 3}.Quantile(0.999)
	far := distuv.ChiSquared{K: 1}.Quantile(1 - 1e-9)
	for _, c := range []struct {
		rate, silence float64
		windowNs      int64
	}{{2, 2, 5e9}, {2, 3, 5e9}, {2, 4, 5e9}, {5, 0, 1e9}} {
		for seed := range uint64(3) {
			const from = 5.0
			farSlips, slips, worst := spinRun(t, seed, spinConfig(c.windowNs), c.rate, from+c.silence+3, from, from+c.silence, far)
			t.Logf("%.0f rad/s, silence %.0f s, seed %d: %d slip events, %d past chi-square %.1f; NEES after at most %.2f (99.9%% region %.2f)", c.rate, c.silence, seed, slips, farSlips, far, worst, limit)
			if farSlips > 0 || worst > limit {
				t.Errorf("%.0f rad/s, IMU silent %.0f s, seed %d: %d slip events past chi-square %.1f, NEES after the silence up to %.2f (99.9%% region %.2f)", c.rate, c.silence, seed, farSlips, far, worst, limit)
			}
		}
	}
}

// TestRotationIMUAcrossBodySteps: a cart whose wheels cannot see rotation
// (one parallel wheel and one lateral, imu_mode rotation) spinning at 1
// rad/s sends 0.1 or 0.3 s of body steps without the IMU's heading (its
// own odometry while the wheels' link was down) between wheel samples with
// it. No sample is refused, its heading stays within the normal's
// two-sided 99.9% point, 3.29 standard deviations (gonum stat/distuv), of
// the truth at every sample, and the wheel sample after the steps reports
// a gap in odometry: the IMU's heading at its start is unknown, so its
// interval is the next one's reference. Before, the IMU's turn since its
// last heading, the steps' turn included, was that sample's turn row: the
// steps' turn counted twice, 0.09 rad off after 0.1 s of steps, and after
// 0.3 s every later wheel sample refused (31 rad/s and more, past
// max_turn_rate_rad_per_s), the heading's reference never moving on.
func TestRotationIMUAcrossBodySteps(t *testing.T) {
	limit := distuv.UnitNormal.Quantile(0.9995)
	for _, steps := range []int64{10, 30} {
		r, err := fusion.New(fusion.Config{Wheels: []fusion.Wheel{{YM: 0.1}, {XM: -0.08, DirectionRad: math.Pi / 2}}, IMU: fusion.IMURotation, Noise: fusion.DefaultNoise()})
		if err != nil {
			t.Fatal(err)
		}
		const rate, dt = 1.0, 0.01
		gaps, refused := 0, 0
		for k := int64(1); k <= 200; k++ {
			t1 := k * 10e6
			th := rate * float64(t1) * 1e-9
			turn := rate * dt
			o := fusion.Odometry{StartNs: t1 - 10e6, StampNs: t1}
			if k >= 50 && k < 50+steps {
				o.Step = &estimator.Step{TurnRad: turn}
			} else {
				z := estimator.Wrap(th)
				o.IMUHeadingRad = &z
				// A spin's wheel travel, (px sin(phi) - py cos(phi)) dth
				// (DEVELOPERS.md, "Design: Motion prediction").
				o.TravelM = []float64{-0.1 * turn, -0.08 * turn}
			}
			res := r.AddOdometry(o)
			if res.Verdict != fusion.VerdictApplied {
				refused++
				continue
			}
			for _, e := range res.Events {
				if e.Kind == fusion.EventOdometryGap {
					gaps++
					if k != 50+steps {
						t.Errorf("%d steps: sample %d: a gap in odometry of %.3f s", steps, k, e.Value)
					}
				}
			}
			p := r.Pose()
			if e := estimator.Wrap(p.Pose.Heading - th); math.Abs(e) > limit*math.Sqrt(p.Cov[8]) {
				t.Errorf("%d steps: sample %d: heading %.4f rad off, %.1f standard deviations", steps, k, e, e/math.Sqrt(p.Cov[8]))
			}
		}
		if refused > 0 {
			t.Errorf("%d steps: %d of 200 samples refused", steps, refused)
		}
		if gaps != 1 {
			t.Errorf("%d steps: %d gaps in odometry reported; want the one after the body steps", steps, gaps)
		}
	}
}
