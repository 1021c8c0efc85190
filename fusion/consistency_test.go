package fusion_test

import (
	"errors"
	"math"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// poseNEES returns the normalised estimation error squared of the pose part:
// e^T P^-1 e with e = truth - estimate (heading wrapped).
func poseNEES(t *testing.T, p fusion.FusedPose, truth estimator.Pose) float64 {
	q, err := estimator.PoseNEES(p.Pose, &p.Cov, truth)
	if err != nil {
		t.Fatalf("covariance %v: %v", p.Cov, err)
	}
	return q
}

// TestNEESConsistency: over Monte Carlo runs of the simulator, whose noise is
// drawn from the filter's own model, the average pose NEES at each checkpoint
// lies in the two-sided 95% band [chi2_{3N}(0.025)/N, chi2_{3N}(0.975)/N]
// (NEES test: Bar-Shalom, Li and Kirubarajan, Estimation with Applications to
// Tracking and Navigation, 2001, section 5.4.2). About 95% of checkpoints
// should; the test asks for 85% to allow for the correlation between
// checkpoints of one run, and for the mean over all of them to be inside
// the band too.
func TestNEESConsistency(t *testing.T) {
	const runs, duration, every = 40, 30.0, int64(500e6)
	for _, sc := range []fusiontest.Scenario{
		{Layout: fusiontest.FreeWheelTurn, IMU: true},
		{Layout: fusiontest.GyroTurn},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, Markers: true},
	} {
		t.Run(sc.Layout.String(), func(t *testing.T) {
			checkpoints := int(duration*1e9/float64(every)) + 1
			sum := make([]float64, checkpoints)
			// NEES at each checkpoint once every input up to 0.3 s after it
			// (its late fixes) has arrived.
			for run := 0; run < runs; run++ {
				sc := sc
				sc.Seed, sc.DurationS = uint64(100+run), duration
				s := fusiontest.New(sc)
				r, err := fusion.New(s.Config())
				if err != nil {
					t.Fatal(err)
				}
				truth := map[int64]estimator.Pose{}
				next := 1 // no odometry ends at 0 in travel mode
				for {
					in, ok := s.Next()
					if !ok {
						break
					}
					fusiontest.Feed(r, &in)
					if in.Odometry != nil && in.Odometry.StampNs%every == 0 {
						truth[in.Odometry.StampNs] = in.Truth
					}
					for next < checkpoints {
						ts := int64(next) * every
						tr, have := truth[ts]
						if !have || r.NewestNs() < ts+300e6 {
							break
						}
						p, err := r.PoseAt(ts)
						if err != nil {
							t.Fatalf("PoseAt(%d): %v", ts, err)
						}
						sum[next] += poseNEES(t, p, tr)
						next++
					}
				}
			}
			dist := distuv.ChiSquared{K: 3 * runs}
			lo, hi := dist.Quantile(0.025)/runs, dist.Quantile(0.975)/runs
			inside, counted := 0, 0
			var total float64
			for k := 1; k < checkpoints-1; k++ { // the last lacks its later fixes
				avg := sum[k] / runs
				if avg == 0 {
					continue
				}
				counted++
				total += avg
				if avg >= lo && avg <= hi {
					inside++
				}
			}
			frac := float64(inside) / float64(counted)
			mean := total / float64(counted)
			t.Logf("average NEES %.2f, %d of %d checkpoints inside [%.2f, %.2f]", mean, inside, counted, lo, hi)
			if counted < checkpoints/2 {
				t.Fatalf("only %d of %d checkpoints evaluated", counted, checkpoints)
			}
			if !(frac >= 0.85 && mean >= lo && mean <= hi) {
				t.Errorf("inconsistent: mean NEES %.2f, %.0f%% of checkpoints inside [%.2f, %.2f]", mean, 100*frac, lo, hi)
			}
		})
	}
}

// rmsError runs a scenario and returns the RMS position error at odometry
// stamps, and the robot.
func rmsError(t *testing.T, sc fusiontest.Scenario, withFixes bool) (float64, *fusion.Robot, []fusion.Result, []fusiontest.Input) {
	s := fusiontest.New(sc)
	r, err := fusion.New(s.Config())
	if err != nil {
		t.Fatal(err)
	}
	var se float64
	var n int
	var results []fusion.Result
	var ins []fusiontest.Input
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		if in.Fix != nil && !withFixes {
			continue
		}
		res := fusiontest.Feed(r, &in)
		results = append(results, res)
		ins = append(ins, in)
		if in.Odometry != nil {
			p := r.Pose()
			se += math.Pow(p.Pose.X-in.Truth.X, 2) + math.Pow(p.Pose.Y-in.Truth.Y, 2)
			n++
		}
	}
	return math.Sqrt(se / float64(n)), r, results, ins
}

// TestGatingRejectsOutliers: with 10% of camera fixes wrong by 1 to 3 m, the
// gate refuses nearly all of them and keeps nearly all good ones, and the
// fused error is well below odometry alone.
func TestGatingRejectsOutliers(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 31, OutlierFraction: 0.1, DurationS: 120, SlipPerS: 0.02}
	fused, _, results, ins := rmsError(t, sc, true)
	odo, _, _, _ := rmsError(t, sc, false)
	verdicts := map[int]fusion.Verdict{}
	seqOf := map[uint64]int{}
	for i, res := range results {
		if ins[i].Fix == nil {
			continue
		}
		verdicts[i] = res.Verdict
		seqOf[res.Seq] = i
	}
	for _, res := range results {
		for _, rs := range res.Resolved {
			if i, ok := seqOf[rs.Seq]; ok {
				verdicts[i] = rs.Verdict
			}
		}
	}
	var outliers, outGated, inliers, inApplied int
	for i, v := range verdicts {
		if ins[i].Outlier {
			outliers++
			if v == fusion.VerdictGated {
				outGated++
			}
		} else {
			inliers++
			if v == fusion.VerdictApplied {
				inApplied++
			}
		}
	}
	t.Logf("outliers gated %d/%d, good fixes applied %d/%d, RMS %.3f m fused vs %.3f m odometry alone", outGated, outliers, inApplied, inliers, fused, odo)
	if outliers < 50 || float64(outGated) < 0.95*float64(outliers) {
		t.Errorf("gated %d of %d outliers", outGated, outliers)
	}
	if float64(inApplied) < 0.95*float64(inliers) {
		t.Errorf("applied %d of %d good fixes", inApplied, inliers)
	}
	if fused > 0.3*odo {
		t.Errorf("fused RMS %.3f m is not well below odometry alone %.3f m", fused, odo)
	}
}

// TestMoveRecovery: the cart is lifted 1.2 m sideways and turned; the
// camera's fixes are refused, agree with one another, and re-initialise the
// pose, after which the error is small again.
func TestMoveRecovery(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 41, DurationS: 40, Bump: &fusiontest.Bump{AtS: 20, DXM: 1.2, DYM: -0.4, DRad: 0.4}}
	s := fusiontest.New(sc)
	r, _ := fusion.New(s.Config())
	recovered := false
	var after []float64
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		res := fusiontest.Feed(r, &in)
		for _, e := range res.Events {
			if e.Kind == fusion.EventMoveRecovered {
				recovered = true
				if moved := math.Hypot(sc.Bump.DXM, sc.Bump.DYM); math.Abs(e.Value-moved) > 0.3 {
					t.Errorf("recovered a jump of %.2f m, moved %.2f m", e.Value, moved)
				}
			}
		}
		if recovered && in.Odometry != nil {
			p := r.Pose()
			after = append(after, math.Hypot(p.Pose.X-in.Truth.X, p.Pose.Y-in.Truth.Y))
		}
	}
	if !recovered {
		t.Fatal("no move recovery")
	}
	if st := r.Stats(); st.Recoveries != 1 {
		t.Errorf("%d recoveries, want 1", st.Recoveries)
	}
	if last := after[len(after)-1]; last > 0.1 {
		t.Errorf("error %.3f m at the end, after recovery", last)
	}
	// With recovery off, the robot stays lost and says so.
	cfg := s.Config()
	cfg.Recovery.Enabled = false
	r2, _ := fusion.New(cfg)
	s2 := fusiontest.New(sc)
	for {
		in, ok := s2.Next()
		if !ok {
			break
		}
		fusiontest.Feed(r2, &in)
	}
	if d := r2.Pose().Distrust; d&fusion.TrustFixesRefused == 0 {
		t.Errorf("without recovery: distrust %v, want fixes-refused", d)
	}
}

// TestSlipSuspected: a layout with four wheels is redundant; a wheel that
// slips gives a residual chi-square above its gate and an event.
func TestSlipSuspected(t *testing.T) {
	cfg := fusion.Config{Wheels: []fusion.Wheel{{YM: 0.12}, {YM: -0.12}, {XM: -0.08, DirectionRad: math.Pi / 2}, {XM: 0.08, DirectionRad: math.Pi / 2}}}
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	slips := 0
	for k := int64(0); k < 100; k++ {
		tr := []float64{0.002, 0.002, 0, 0}
		if k == 50 {
			tr[0] = 0.0002 // the left wheel lost contact
		}
		res := r.AddOdometry(fusion.Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
		for _, e := range res.Events {
			if e.Kind == fusion.EventSlipSuspected {
				slips++
				if k != 50 {
					t.Errorf("slip reported at sample %d", k)
				}
			}
		}
	}
	if slips != 1 || r.Stats().Slips != 1 {
		t.Errorf("%d slip events, want 1", slips)
	}
}

// TestPoseAt: inside the window PoseAt is the estimate at the stamp (an
// interval split by its twist fraction); past the newest odometry it
// extrapolates, bounded.
func TestPoseAt(t *testing.T) {
	cfg := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn}.Config()
	r, _ := fusion.New(cfg)
	coef := func(w fusion.Wheel, s estimator.Step) float64 {
		c := estimator.WheelCoef(w.XM, w.YM, w.DirectionRad)
		return c[0]*s.ForwardM + c[1]*s.LeftM + c[2]*s.TurnRad
	}
	step := estimator.Step{ForwardM: 0.004, LeftM: 0.001, TurnRad: 0.01}
	for k := int64(0); k < 40; k++ {
		tr := make([]float64, len(cfg.Wheels))
		for i, w := range cfg.Wheels {
			tr[i] = coef(w, step)
		}
		r.AddOdometry(fusion.Odometry{StartNs: k * 10e6, StampNs: (k + 1) * 10e6, TravelM: tr})
	}
	at, err := r.PoseAt(300e6)
	if err != nil {
		t.Fatal(err)
	}
	mid, err := r.PoseAt(302.5e6)
	if err != nil {
		t.Fatal(err)
	}
	want := estimator.Advance(at.Pose, step.Scale(0.25))
	if d := math.Hypot(mid.Pose.X-want.X, mid.Pose.Y-want.Y); d > 1e-9 {
		t.Errorf("PoseAt inside an interval: %+v, want %+v", mid.Pose, want)
	}
	ahead, err := r.PoseAt(400e6 + 100e6)
	if err != nil {
		t.Fatal(err)
	}
	wantAhead := estimator.Advance(r.Pose().Pose, step.Scale(10))
	if !ahead.Extrapolated || math.Hypot(ahead.Pose.X-wantAhead.X, ahead.Pose.Y-wantAhead.Y) > 1e-6 {
		t.Errorf("extrapolated %+v, want %+v", ahead.Pose, wantAhead)
	}
	if ahead.Cov[0] <= r.Pose().Cov[0] {
		t.Errorf("extrapolation did not grow the covariance")
	}
	if _, err := r.PoseAt(400e6 + r.Config().MaxExtrapolationNs + 1e6); !errors.Is(err, fusion.ErrTooFarAhead) {
		t.Errorf("far past: %v", err)
	}
	if _, err := r.PoseAt(-1); !errors.Is(err, fusion.ErrTooOld) {
		t.Errorf("before the window: %v", err)
	}
}

// chiBand returns the two-sided 95% band of the mean of n values whose sum
// is chi-square with dof degrees of freedom.
func chiBand(dof, n int) (lo, hi float64) {
	d := distuv.ChiSquared{K: float64(dof)}
	return d.Quantile(0.025) / float64(n), d.Quantile(0.975) / float64(n)
}
