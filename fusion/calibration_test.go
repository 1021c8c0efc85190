package fusion_test

import (
	"math"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestScaleConverges: the greenhouse cart's wheels report 1/1.05 of their
// true travel (a 5% scale error, as on carts whose wheels wear or whose
// tyres are soft), with the simulator's noise on and an absolute IMU at
// 100 Hz. With the scale states on, camera pose fixes make forward_scale
// and turn_scale converge to the injected 1.05: over 8 runs of 120 s, the
// errors over their standard errors (z) have a mean within the two-sided
// 99% band of a mean of 8 standard normals (|mean| < 2.576/sqrt(8)) and a
// root mean square within the 99% band of a chi-square of 8 degrees of
// freedom over 8 (0.41 to 1.66; quantiles from gonum stat/distuv), and
// every standard error falls below 1%. The simulator's noise is the
// configured one, and the configuration says it knows it to a tenth
// (calibration.noise_ratio_std 0.1): with the default 0.5, which covers a
// true noise from none to 1.5 times the configured, the turn scale's
// standard error on the free-wheel cart is 1.6% to 1.7% (the pull taken
// out over 120 s is some 3% of the scale, and the spread of it is carried
// as a consider parameter, "Design: State") and its z root mean square
// 0.42. (Scaling every wheel's travel
// scales the forward, left and turn of the step alike.) Before the update
// took out the pull of the reported turns' own noise (errors in variables,
// "Design: State"), the free-wheel layout's turn scale had a mean z of
// -4.0, every run beyond -2.4.
func TestScaleConverges(t *testing.T) {
	const scale, runs = 1.05, 8
	lo := math.Sqrt(distuv.ChiSquared{K: runs}.Quantile(0.005) / runs)
	hi := math.Sqrt(distuv.ChiSquared{K: runs}.Quantile(0.995) / runs)
	meanMax := distuv.UnitNormal.Quantile(0.995) / math.Sqrt(runs)
	for _, layout := range []fusiontest.Layout{fusiontest.FreeWheelTurn, fusiontest.DriveWheelTurn} {
		t.Run(layout.String(), func(t *testing.T) {
			var z [2][]float64
			for k := 0; k < runs; k++ {
				s := fusiontest.New(fusiontest.Scenario{Layout: layout, IMU: true, DurationS: 120, Seed: uint64(31 + k)})
				cfg := s.Config()
				cfg.Calibration = fusion.Calibration{Scale: true, NoiseRatioStd: 0.1}
				r, err := fusion.New(cfg)
				if err != nil {
					t.Fatal(err)
				}
				for in, ok := s.Next(); ok; in, ok = s.Next() {
					if o := in.Odometry; o != nil {
						tr := make([]float64, len(o.TravelM))
						for i, v := range o.TravelM {
							tr[i] = v / scale
						}
						o.TravelM = tr
					}
					fusiontest.Feed(r, &in)
				}
				st := r.Estimate()
				l := r.Layout()
				for c, i := range []int{l.ForwardScale(), l.TurnScale()} {
					se := math.Sqrt(st.Var(i))
					if se > 0.01 {
						t.Errorf("seed %d: scale %d's standard error %.5f", 31+k, i, se)
					}
					z[c] = append(z[c], (st.MeanAt(i)-scale)/se)
				}
			}
			for c, name := range []string{"forward_scale", "turn_scale"} {
				var mean, ms float64
				for _, v := range z[c] {
					mean += v / runs
					ms += v * v / runs
				}
				t.Logf("%s: z mean %.2f, root mean square %.2f (%.2f)", name, mean, math.Sqrt(ms), z[c])
				if math.Abs(mean) > meanMax || math.Sqrt(ms) < lo || math.Sqrt(ms) > hi {
					t.Errorf("%s: z mean %.2f (band +-%.2f), root mean square %.2f (band %.2f to %.2f)", name, mean, meanMax, math.Sqrt(ms), lo, hi)
				}
			}
		})
	}
}

// TestStepNoisePerSecond: body-step odometry with noise per second (as from
// commanded velocities) gives the same estimate at 50 Hz and at 500 Hz
// (the terms add over sub-intervals), and a robot commanded to stand still
// for 10 s, facing +x, gains exactly 10 s of the forward and leftward
// per-second variances in x and y.
func TestStepNoisePerSecond(t *testing.T) {
	cfg := fusion.Config{Noise: fusion.Noise{StepForwardVarM2PerS: 4e-4, StepLeftVarM2PerS: 1e-4, StepTurnVarRad2PerS: 2e-4},
		Calibration: fusion.Calibration{Scale: true}}
	run := func(hz int64, forward, turn float64) fusion.FusedPose {
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		period := int64(1e9) / hz
		dt := float64(period) * 1e-9
		for k := int64(0); k < 10*hz; k++ {
			step := estimator.Step{ForwardM: forward * dt, TurnRad: turn * dt}
			if res := r.AddOdometry(fusion.Odometry{StartNs: k * period, StampNs: (k + 1) * period, Step: &step}); res.Verdict != fusion.VerdictApplied {
				t.Fatal(res.Err)
			}
		}
		return r.Pose()
	}
	a, b := run(50, 0.3, 0.2), run(500, 0.3, 0.2)
	if d := math.Hypot(a.Pose.X-b.Pose.X, a.Pose.Y-b.Pose.Y); d > 1e-9 {
		t.Errorf("end positions differ by %g m", d)
	}
	for i := 0; i < 9; i += 4 {
		if rel := math.Abs(a.Cov[i]-b.Cov[i]) / b.Cov[i]; rel > 1e-3 {
			t.Errorf("variance %d: %.6g at 50 Hz vs %.6g at 500 Hz", i/4, a.Cov[i], b.Cov[i])
		}
	}
	still := run(100, 0, 0)
	def, _ := fusion.New(cfg)
	c0 := def.Pose().Cov
	if dx, dy := still.Cov[0]-c0[0], still.Cov[4]-c0[4]; math.Abs(dx-4e-3) > 1e-12 || math.Abs(dy-1e-3) > 1e-12 {
		t.Errorf("standing still: x and y variances grew by %g and %g, want 4e-3 and 1e-3", dx, dy)
	}
}

// TestRateBiasConverges: the greenhouse cart's wheels under-report its turn
// by 0.01 rad/s (as an uncalibrated wheel base or a drifting gyro would),
// with the simulator's noise off and an absolute IMU for heading. With the
// rate-bias state on, b_r converges to the injected 0.01 rad/s within two
// standard errors. The wheels' travels are changed by what a turn of
// -b dt adds to each: -(x sin(dir) - y cos(dir)) b dt.
func TestRateBiasConverges(t *testing.T) {
	const bias = 0.01
	s := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, NoiseFree: true, IMU: true, DurationS: 120, Seed: 32})
	cfg := s.Config()
	cfg.Calibration = fusion.Calibration{RateBias: true}
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	for in, ok := s.Next(); ok; in, ok = s.Next() {
		if o := in.Odometry; o != nil {
			dt := float64(o.StampNs-o.StartNs) * 1e-9
			tr := make([]float64, len(o.TravelM))
			for i, w := range cfg.Wheels {
				tr[i] = o.TravelM[i] - estimator.WheelCoef(w.XM, w.YM, w.DirectionRad)[2]*bias*dt
			}
			o.TravelM = tr
		}
		fusiontest.Feed(r, &in)
	}
	st := r.Estimate()
	i := r.Layout().RateBias()
	est, se := st.MeanAt(i), math.Sqrt(st.Var(i))
	t.Logf("rate bias %.5f +- %.5f rad/s (injected %g)", est, se, bias)
	if math.Abs(est-bias) > 2*se || se > bias/5 {
		t.Errorf("rate bias %.5f rad/s with standard error %.5f, injected %g", est, se, bias)
	}
}

// TestTurnScaleHeldOnStraights: a free-wheel cart with an absolute IMU
// whose odometry over-reports its turns by 10% and its travel by 6%, the
// scale states on. On straights the reported turn is the wheels' noise
// alone, and an update that regressed the IMU's headings on it would pull
// the turn scale towards 0 (errors in variables; regression dilution,
// Fuller, Measurement Error Models, 1987, sec. 1.1): before the scales were
// held below excitation (DEVELOPERS.md, "Design: State") the turn scale
// fell to -0.02 and the pose lay outside its 99.9% region on 25% of the
// samples. Now the turn scale stays within three prior standard deviations
// of the truth all along, and the pose is outside that region on at most
// 0.3% of the samples (0.1% for a consistent filter, with room for six
// short runs).
func TestTurnScaleHeldOnStraights(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, DurationS: 60,
		Errors: fusiontest.Errors{ForwardScale: 0.06, TurnScale: 0.10}}
	truth := 1 / 1.10 // the filter's scale undoes the reported one
	var sum trustTally
	for k := range 6 {
		sc.Seed = uint64(1000 + 37*k)
		s := fusiontest.New(sc)
		cfg := s.TrueModelConfig()
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		i := r.Layout().TurnScale()
		lo, hi := truth-3*cfg.Calibration.ScaleStd, truth+3*cfg.Calibration.ScaleStd
		for in, ok := s.Next(); ok; in, ok = s.Next() {
			fusiontest.Feed(r, &in)
			if st := r.Estimate(); !(st.MeanAt(i) >= lo && st.MeanAt(i) <= hi) {
				t.Fatalf("seed %d at %d ns: turn scale %.3f outside [%.3f, %.3f] (truth %.3f)", sc.Seed, r.Pose().StampNs, st.MeanAt(i), lo, hi, truth)
			}
		}
		sum.add(trustViolations(t, trustCase{name: "free-wheel-imu-scale", sc: sc, trueModel: true}))
	}
	frac := float64(sum.outside) / float64(sum.samples)
	t.Logf("%d samples, %.3f%% outside the 99.9%% region", sum.samples, 100*frac)
	if frac > 0.003 {
		t.Errorf("pose outside its 99.9%% region on %.3f%% of samples, want at most 0.3%%", 100*frac)
	}
}

// TestRotationGyroDrift: in imu_mode rotation the turn comes from the IMU's
// heading differences, so the IMU's zero drifting (imu_offset_var_rad2_per_s)
// is the heading's random walk. The simulated gyro-turn cart's IMU zero
// walks at 1e-5 rad^2/s (a poor gyro) and the configuration says so; over 16
// runs of 60 s the mean pose NEES at the odometry samples of the last 30 s
// lies in the two-sided 95% band of 16 runs' mean of a chi-square of 3
// degrees of freedom (Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2;
// quantiles from gonum stat/distuv). Before, the rotation mode took the
// heading's random walk from heading_var_rad2_per_s (1e-7) and left the
// configured drift unused: mean NEES 31.6, half the samples outside the
// 99.9% region.
func TestRotationGyroDrift(t *testing.T) {
	const runs = 16
	lo := distuv.ChiSquared{K: 3 * runs}.Quantile(0.025) / runs
	hi := distuv.ChiSquared{K: 3 * runs}.Quantile(0.975) / runs
	var mean float64
	for k := 0; k < runs; k++ {
		s := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.GyroTurn, Seed: uint64(700 + k), DurationS: 60,
			Heading: fusiontest.HeadingNoise{IMUOffsetVarRad2PerS: 1e-5}})
		cfg := s.Config()
		if cfg.IMU != fusion.IMURotation || cfg.Noise.IMUOffsetVarRad2PerS != 1e-5 {
			t.Fatalf("imu_mode %v with offset random walk %g", cfg.IMU, cfg.Noise.IMUOffsetVarRad2PerS)
		}
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		var sum float64
		var n int
		for in, ok := s.Next(); ok; in, ok = s.Next() {
			res := fusiontest.Feed(r, &in)
			if in.Odometry == nil || res.Seq == 0 || in.Odometry.StampNs < 30e9 {
				continue
			}
			p := r.Pose()
			nees, err := estimator.PoseNEES(p.Pose, &p.Cov, in.Truth)
			if err != nil {
				t.Fatal(err)
			}
			sum += nees
			n++
		}
		mean += sum / float64(n) / runs
	}
	t.Logf("mean NEES %.2f, band [%.2f, %.2f]", mean, lo, hi)
	if mean < lo || mean > hi {
		t.Errorf("mean NEES %.2f outside [%.2f, %.2f]", mean, lo, hi)
	}
}
