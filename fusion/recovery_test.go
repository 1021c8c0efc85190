package fusion_test

import (
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// frame is a move and turn of the field frame: a field pose p becomes
// Compose(frame, p).
type frame estimator.Pose

// pose moves a field pose into the frame.
func (f frame) pose(p estimator.Pose) estimator.Pose { return estimator.Compose(estimator.Pose(f), p) }

// cov turns a 3x3 pose covariance into the frame: B C B^T with B =
// blockdiag(R(heading), 1).
func (f frame) cov(c []float64) []float64 {
	s, co := math.Sincos(f.Heading)
	b := [9]float64{co, -s, 0, s, co, 0, 0, 0, 1}
	var in, out [9]float64
	copy(in[:], c)
	estimator.Sandwich(&out, &b, &in)
	return out[:]
}

// config moves a configuration's start pose and landmarks into the frame.
func (f frame) config(c fusion.Config) fusion.Config {
	c.StartPose = f.pose(c.StartPose)
	c.StartCov = f.cov(c.StartCov)
	ls := make([]fusion.Landmark, len(c.Landmarks))
	for i, l := range c.Landmarks {
		p := f.pose(estimator.Pose{X: l.XM, Y: l.YM})
		ls[i] = fusion.Landmark{ID: l.ID, XM: p.X, YM: p.Y}
	}
	c.Landmarks = ls
	return c
}

// input moves an input's field quantities into the frame: pose fixes, IMU
// headings and the truth; body-frame odometry and landmark fixes stay.
func (f frame) input(in fusiontest.Input) fusiontest.Input {
	in.Truth = f.pose(in.Truth)
	switch {
	case in.Heading != nil:
		h := *in.Heading
		h.HeadingRad = estimator.Wrap(h.HeadingRad + f.Heading)
		in.Heading = &h
	case in.Odometry != nil && in.Odometry.IMUHeadingRad != nil:
		o := *in.Odometry
		v := estimator.Wrap(*o.IMUHeadingRad + f.Heading)
		o.IMUHeadingRad = &v
		in.Odometry = &o
	case in.Fix != nil && in.Fix.Kind == fusion.FixPose:
		x := *in.Fix
		p := f.pose(estimator.Pose{X: x.XM, Y: x.YM, Heading: x.HeadingRad})
		x.XM, x.YM, x.HeadingRad = p.X, p.Y, estimator.Wrap(p.Heading)
		x.Cov = f.cov(x.Cov)
		in.Fix = &x
	}
	return in
}

// recoveryRun feeds a bumped run, in the frame, and returns the index of
// the input that recovered (-1: none), counted from the first input after
// the bump, and the robot.
func recoveryRun(t *testing.T, sc fusiontest.Scenario, f frame) (int, *fusion.Robot) {
	t.Helper()
	s := fusiontest.New(sc)
	r, err := fusion.New(f.config(s.Config()))
	if err != nil {
		t.Fatal(err)
	}
	var ins []fusiontest.Input
	for in, ok := s.Next(); ok; in, ok = s.Next() {
		ins = append(ins, f.input(in))
	}
	return recoveredAt(r, ins), r
}

// recoveredAt feeds ins to r and returns the index of the input that
// recovered (-1: none), counted from the first input after the bump.
func recoveredAt(r *fusion.Robot, ins []fusiontest.Input) int {
	at, k := -1, 0
	for i := range ins {
		res := fusiontest.Feed(r, &ins[i])
		if ins[i].Bumped {
			k++
		}
		for _, e := range res.Events {
			if e.Kind == fusion.EventMoveRecovered && at < 0 {
				at = k
			}
		}
	}
	return at
}

// TestRecoveryFrameInvariant: the same bumped run with the field frame at
// the origin and moved by 100 m and turned recovers at the same input,
// because agreement is judged on poses carried by body-frame odometry and
// compared in the body frame ("Design: Gating and recovery"; the decision
// is invariant by construction, so the test asks for the very same input).
func TestRecoveryFrameInvariant(t *testing.T) {
	far := frame{X: 100, Y: -60, Heading: 2.1}
	for _, sc := range []fusiontest.Scenario{
		{Layout: fusiontest.FreeWheelTurn, Seed: 41, DurationS: 30, Bump: &fusiontest.Bump{AtS: 20, DXM: 1.2, DYM: -0.4, DRad: 0.4}},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, Seed: 42, DurationS: 30, OutlierFraction: 0.05, Bump: &fusiontest.Bump{AtS: 14, DXM: -0.5, DYM: 0.3, DRad: -0.2}},
		{Layout: fusiontest.GyroTurn, Seed: 43, DurationS: 30, Bump: &fusiontest.Bump{AtS: 17, DXM: 0.3, DYM: 0.6}},
	} {
		near, _ := recoveryRun(t, sc, frame{})
		moved, r := recoveryRun(t, sc, far)
		t.Logf("%s: recovered at input %d after the bump at the origin, %d at 100 m and turned", sc.Layout, near, moved)
		if near < 0 || near != moved {
			t.Errorf("%s: recovered at input %d after the bump at the origin, %d at 100 m", sc.Layout, near, moved)
		}
		if st := r.Stats(); st.Recoveries != 1 {
			t.Errorf("%s: %d recoveries at 100 m, want 1", sc.Layout, st.Recoveries)
		}
	}
}

// TestRecoveryKeepsIMUHeading: a recovery keeps the IMU offset the robot
// already knows, so that the IMU, a few milliradians good, sets the heading
// after it rather than the camera's fix (0.02 rad). Over five bumped runs
// the RMS heading error in the second after the recovery is below that of
// the same runs without an IMU.
func TestRecoveryKeepsIMUHeading(t *testing.T) {
	rms := func(imu bool) float64 {
		var se float64
		var n int
		for seed := uint64(0); seed < 5; seed++ {
			sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: imu, Seed: 60 + seed, DurationS: 25,
				Bump: &fusiontest.Bump{AtS: 20, DXM: 0.7, DYM: -0.5, DRad: 0.5}}
			s := fusiontest.New(sc)
			r, err := fusion.New(s.Config())
			if err != nil {
				t.Fatal(err)
			}
			var at int64 = -1
			for in, ok := s.Next(); ok; in, ok = s.Next() {
				res := fusiontest.Feed(r, &in)
				for _, e := range res.Events {
					if e.Kind == fusion.EventMoveRecovered && at < 0 {
						at = r.NewestNs()
					}
				}
				if at >= 0 && in.Odometry != nil && r.NewestNs() <= at+1e9 {
					d := estimator.Wrap(r.Pose().Pose.Heading - in.Truth.Heading)
					se += d * d
					n++
				}
			}
			if at < 0 {
				t.Fatalf("imu %v seed %d: no recovery", imu, sc.Seed)
			}
		}
		return math.Sqrt(se / float64(n))
	}
	with, without := rms(true), rms(false)
	t.Logf("RMS heading error in the second after recovery: %.4f rad with the IMU, %.4f rad without", with, without)
	if !(with < without) {
		t.Errorf("heading after recovery: %.4f rad with the IMU, not below %.4f rad without", with, without)
	}
}

// TestLandmarkRecovery: a cart that sees only range and bearing to mapped
// posts, two or three in view, is pushed 0.7 m and turned 0.3 rad; its
// refused landmark fixes determine its pose by Gauss-Newton and reseed it,
// after which it follows the truth again. With only one post in view the
// pose is not determined (the track can turn about the post) and there is
// no recovery.
func TestLandmarkRecovery(t *testing.T) {
	posts := []fusion.Landmark{{ID: "a", XM: 4, YM: 1.5}, {ID: "b", XM: 4, YM: -1.5}, {ID: "c", XM: 6, YM: 0.5}}
	run := func(seen []fusion.Landmark) (recovered bool, errAfter float64) {
		cfg := fusion.Config{Recovery: fusion.Recovery{Enabled: true}, Landmarks: seen,
			Sensors: []fusion.Sensor{{ID: "camera", Kind: fusion.FixLandmark}}}
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		rng := rand.New(rand.NewPCG(5, 6))
		const rangeStd, bearingStd = 0.02, 0.01
		var truth estimator.Pose
		step := estimator.Step{ForwardM: 0.004, TurnRad: 0.0005} // 0.4 m/s, 0.05 rad/s at 100 Hz
		for k := int64(0); k < 600; k++ {
			t0, t1 := k*10e6, (k+1)*10e6
			truth = estimator.Advance(truth, step)
			if k == 300 {
				truth = estimator.Pose{X: truth.X + 0.5, Y: truth.Y - 0.5, Heading: truth.Heading + 0.3}
			}
			r.AddOdometry(fusion.Odometry{StartNs: t0, StampNs: t1, Step: &step})
			if k%10 != 9 {
				continue
			}
			l := seen[int(k/10)%len(seen)]
			dx, dy := l.XM-truth.X, l.YM-truth.Y
			rg := math.Hypot(dx, dy) + rng.NormFloat64()*rangeStd
			b := estimator.Wrap(math.Atan2(dy, dx) - truth.Heading + rng.NormFloat64()*bearingStd)
			res := r.AddFix(fusion.Fix{StampNs: t1, SensorID: "camera", Kind: fusion.FixLandmark, LandmarkID: l.ID,
				RangeM: &rg, BearingRad: &b, Cov: []float64{rangeStd * rangeStd, 0, 0, bearingStd * bearingStd}})
			for _, e := range res.Events {
				if e.Kind == fusion.EventMoveRecovered {
					recovered = true
					t.Logf("%d posts: %s at %.2f s", len(seen), e.Detail, float64(e.StampNs)*1e-9)
				}
			}
		}
		p := r.Pose().Pose
		return recovered, math.Hypot(p.X-truth.X, p.Y-truth.Y)
	}
	ok, e := run(posts)
	if !ok || e > 0.1 {
		t.Errorf("three posts: recovered %v, final error %.3f m", ok, e)
	}
	if ok, _ := run(posts[:1]); ok {
		t.Error("one post: recovered, but one post leaves the pose undetermined")
	}
}

// TestRecoveryWithCalibration: with odometry scale errors and the scale
// states configured (fusiontest's TrueModelConfig), a bumped robot
// recovers once after the bump, from pose fixes and from landmark
// fixes, because the refused fixes are carried by the calibrated odometry
// with the calibration's uncertainty ("Design: Gating and recovery"), and it
// ends inside the 99.9% region of its estimate (pose NEES below the 3-dof
// chi-square quantile, 16.27, from gonum stat/distuv). The bumps that turn
// the robot come without an IMU: with one, the IMU sees the turn and the
// slip rule ("Design: Gating and recovery") inflates the steps so that the
// fixes are applied and no recovery is needed.
func TestRecoveryWithCalibration(t *testing.T) {
	scale := fusiontest.Errors{ForwardScale: 0.12, TurnScale: -0.1}
	for _, sc := range []fusiontest.Scenario{
		{Layout: fusiontest.FreeWheelTurn, Seed: 51, DurationS: 40, Errors: scale, Bump: &fusiontest.Bump{AtS: 25, DXM: 0.8, DYM: -0.4, DRad: 0.4}},
		{Layout: fusiontest.GyroTurn, Seed: 52, DurationS: 40, Errors: scale, Bump: &fusiontest.Bump{AtS: 25, DXM: -0.6, DYM: 0.5, DRad: -0.3}},
		{Layout: fusiontest.DriveWheelTurn, MarkerCount: 16, Seed: 53, DurationS: 40, Errors: scale, Bump: &fusiontest.Bump{AtS: 25, DXM: 0.5, DYM: -0.4}},
		{Layout: fusiontest.Commanded, MarkerCount: 16, Seed: 54, DurationS: 40, Errors: scale, Bump: &fusiontest.Bump{AtS: 25, DXM: 0.5, DYM: 0.4}},
	} {
		s := fusiontest.New(sc)
		cfg := s.TrueModelConfig()
		if !cfg.Calibration.Scale {
			t.Fatalf("%s: the true model has no scale states", sc.Layout)
		}
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		var before, after int
		var last fusiontest.Input
		for in, ok := s.Next(); ok; in, ok = s.Next() {
			res := fusiontest.Feed(r, &in)
			for _, e := range res.Events {
				if e.Kind == fusion.EventMoveRecovered {
					if in.Bumped {
						after++
						t.Logf("%s seed %d: %s", sc.Layout, sc.Seed, e.Detail)
					} else {
						before++
						t.Logf("%s seed %d: before the bump at %.2f s: %s", sc.Layout, sc.Seed, float64(e.StampNs)*1e-9, e.Detail)
					}
				}
			}
			if in.Odometry != nil {
				last = in
			}
		}
		p := r.Pose()
		nees, err := estimator.PoseNEES(p.Pose, &p.Cov, last.Truth)
		// A recovery before the bump is no fault of recovery: the estimate
		// was wrong (a scale estimate can be off, see DEVELOPERS.md,
		// "Design: State"), and the fixes said so.
		if after != 1 || err != nil || nees > 16.27 {
			t.Errorf("%s seed %d: %d recoveries after the bump, %d before; final NEES %.2f (%v)", sc.Layout, sc.Seed, after, before, nees, err)
		}
	}
}

// TestRecoveryKeepsBiasCorrelation: a cart with a Gauss-Markov camera
// (correlation 0.9 between fixes 0.3 s apart, its true model configured)
// is moved by hand and recovers from the camera's refused fixes. The reset
// pose is the camera's, less its bias's mean, so its error is minus the
// bias's: the camera's next fixes repeat that bias and cannot tell the pose
// better than the bias's own spread. So the position variance must stay
// at least half the bias's (the white part and the odometry add little).
// Before the reset kept that correlation (Filter.CorrelateBias) it fell to
// about the white part, a thousandth, and the estimate was then outside
// its 99.9% region on 0.17% of the samples of such runs (0.09% now; linear
// transformation of covariances, Bar-Shalom, Li and Kirubarajan 2001, sec.
// 1.4.15, from memory).
func TestRecoveryKeepsBiasCorrelation(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, CameraHz: 10 / 3.0, Seed: 3, DurationS: 40,
		Errors: fusiontest.Errors{CameraTauS: 2.85}, Bump: &fusiontest.Bump{AtS: 20.37, DXM: 0.6, DYM: -0.3, DRad: 0.3}}
	s := fusiontest.New(sc)
	cfg := s.TrueModelConfig()
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	at, _ := r.Layout().Bias(0)
	recovered, fixesAfter := false, 0
	for in, ok := s.Next(); ok; in, ok = s.Next() {
		res := fusiontest.Feed(r, &in)
		for _, e := range res.Events {
			if e.Kind == fusion.EventMoveRecovered {
				recovered = true
			}
		}
		if !recovered || in.Fix == nil || res.Verdict != fusion.VerdictApplied {
			continue
		}
		fixesAfter++
		st := r.Estimate()
		for i := 0; i < 2; i++ {
			if pv, bv := st.Var(i), st.Var(at+i); pv < 0.5*bv {
				t.Fatalf("fix %d after the recovery: position variance %d %.3g m2, below half the camera bias's %.3g", fixesAfter, i, pv, bv)
			}
		}
		if fixesAfter == 20 {
			return
		}
	}
	t.Fatalf("recovered %v, %d fixes applied after; the test needs a recovery and 20 fixes", recovered, fixesAfter)
}

// TestRelocationCovarianceHonest: the pose that landmark relocation gives
// must hold its truth as its covariance says. Over Monte Carlo runs of a
// differential drive with 8% and 12% odometry scale errors (its scale
// states configured) moved by hand, the NEES of the relocated pose against
// the truth at the recovering input, averaged over the runs, must lie inside
// the two-sided 95% band of the chi-square with 3 dof per run (Bar-Shalom,
// Li and Kirubarajan 2001, sec. 5.4.2; quantiles from gonum stat/distuv).
// Weighting the refused fixes as independent evidence, as relocation did
// before it took their shared odometry into account (refineJoint), gave a
// mean NEES of 4.41 here (one run 38): two dozen fixes carried over seconds
// of the same odometry shrank its error as if it were a fresh one each time.
func TestRelocationCovarianceHonest(t *testing.T) {
	var sum float64
	runs := 0
	for k := 0; k < 40; k++ {
		sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, MarkerCount: 16, Seed: uint64(300 + k), DurationS: 40,
			Errors: fusiontest.Errors{ForwardScale: -0.08, TurnScale: 0.12},
			Bump:   &fusiontest.Bump{AtS: 20 + 0.37*float64(k%7), DXM: 0.4, DYM: -0.3, DRad: 0.2}}
		s := fusiontest.New(sc)
		r, err := fusion.New(s.TrueModelConfig())
		if err != nil {
			t.Fatal(err)
		}
		found := false
		truth := map[int64]estimator.Pose{}
		for in, ok := s.Next(); ok && !found; in, ok = s.Next() {
			truth[in.StampNs()] = in.Truth
			res := fusiontest.Feed(r, &in)
			for _, e := range res.Events {
				if e.Kind != fusion.EventMoveRecovered || !in.Bumped {
					continue
				}
				// The recovering fix's stamp is inside the window: the
				// estimate there is the relocated pose, the truth the
				// simulator's at that stamp.
				p, err := r.PoseAt(e.StampNs)
				if err != nil {
					t.Fatal(err)
				}
				tr, ok := truth[e.StampNs]
				if !ok {
					t.Fatalf("seed %d: no input stamped at the recovery's %d ns", sc.Seed, e.StampNs)
				}
				nees, err := estimator.PoseNEES(p.Pose, &p.Cov, tr)
				if err != nil {
					t.Fatal(err)
				}
				sum += nees
				runs++
				found = true
			}
		}
	}
	if runs < 30 {
		t.Fatalf("only %d of 40 runs recovered after the bump", runs)
	}
	chi := distuv.ChiSquared{K: float64(3 * runs)}
	lo, hi := chi.Quantile(0.025)/float64(runs), chi.Quantile(0.975)/float64(runs)
	mean := sum / float64(runs)
	t.Logf("%d relocations: mean NEES %.2f, band [%.2f, %.2f]", runs, mean, lo, hi)
	if mean < lo || mean > hi {
		t.Errorf("relocated pose: mean NEES %.2f over %d runs outside the 95%% band [%.2f, %.2f]", mean, runs, lo, hi)
	}
}

// TestRecoveryLearnsJumpedIMUOffset: the IMU's zero jumps mid-run (its
// controller re-zeroes it, or a brown-out resets it) while the cart drives
// on. The ungated IMU pulls the heading to its new zero, the camera's fixes
// are refused, and recovery re-initialises the pose from them. Had the
// recovery kept the IMU offset, the IMU would pull the heading back at its
// next sample, the fixes would be refused again, and recovery would repeat
// to the end of the run (it did, 100 times in 150 s on an independent
// simulator). The recovery learns the offset again when the fixes' heading
// lies outside the 1-dof chi-square region (gonum stat/distuv via
// estimator.GateThreshold) around the IMU's: one or two recoveries, then the
// fixes are applied again and the heading follows the truth.
func TestRecoveryLearnsJumpedIMUOffset(t *testing.T) {
	for _, jump := range []float64{1.0, -0.4} {
		for seed := uint64(0); seed < 3; seed++ {
			sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 80 + seed, DurationS: 40}
			s := fusiontest.New(sc)
			cfg := s.Config()
			cfg.Recovery.Enabled = true
			r, err := fusion.New(cfg)
			if err != nil {
				t.Fatal(err)
			}
			var recoveries, applied, fixes int
			var se float64
			var n int
			for in, ok := s.Next(); ok; in, ok = s.Next() {
				if in.Heading != nil && in.Heading.StampNs >= 15e9 {
					in.Heading.HeadingRad = estimator.Wrap(in.Heading.HeadingRad + jump)
				}
				res := fusiontest.Feed(r, &in)
				for _, e := range res.Events {
					if e.Kind == fusion.EventMoveRecovered {
						recoveries++
					}
				}
				if in.Fix != nil && in.Fix.StampNs >= 25e9 {
					fixes++
					if res.Verdict == fusion.VerdictApplied {
						applied++
					}
				}
				if in.Odometry != nil && r.NewestNs() >= 25e9 {
					d := estimator.Wrap(r.Pose().Pose.Heading - in.Truth.Heading)
					se += d * d
					n++
				}
			}
			rms := math.Sqrt(se / float64(n))
			t.Logf("jump %.1f rad, seed %d: %d recoveries, %d of %d fixes applied in the last 15 s, RMS heading error %.4f rad", jump, sc.Seed, recoveries, applied, fixes, rms)
			// Two recoveries at most: the first may come from fixes refused
			// before the IMU's pull was complete (common practice: a bound
			// with room, not a measured count).
			if recoveries < 1 || recoveries > 2 {
				t.Errorf("jump %.1f rad, seed %d: %d recoveries, want 1 or 2", jump, sc.Seed, recoveries)
			}
			if float64(applied) < 0.8*float64(fixes) {
				t.Errorf("jump %.1f rad, seed %d: %d of %d fixes applied after the recovery", jump, sc.Seed, applied, fixes)
			}
			// The camera's heading is good to 0.02 rad (the simulator's
			// default); a tenth of a radian is far outside what a tracking
			// estimate shows.
			if rms > 0.1 {
				t.Errorf("jump %.1f rad, seed %d: RMS heading error %.4f rad after the recovery", jump, sc.Seed, rms)
			}
		}
	}
}

// renamedRun drives a robot at 0.3 m/s along a row of posts 5 m apart on
// either side (y = +-1.75 m, 3 cm off their mapped positions, the map's
// survey error declared, so landmark blocks track the posts in view), a
// camera at 5 Hz reporting every post 1 to 7 m ahead within 0.6 rad with 5
// cm and 10 mrad of white error. From 15 s to 17 s, while the posts at 10
// m have been in view for 4 s, every post is reported under the name of the
// post one spacing further along (renamed); or (move) at 15 s the robot is
// set down moveM further along. It returns the
// recoveries, the misnamed fixes applied and the final position error.
func renamedRun(t *testing.T, renamed bool, moveM float64) (recoveries, misApplied int, errM float64) {
	t.Helper()
	const gap, half, rangeStd, bearingStd = 5.0, 1.75, 0.05, 0.010
	rng := rand.New(rand.NewPCG(7, 8))
	name := func(i int, side float64) string { return fmt.Sprintf("post-%d-%+.0f", i, side) }
	type post struct {
		i          int
		side, x, y float64
	}
	var posts []post
	var lms []fusion.Landmark
	for i := 0; i <= 12; i++ {
		for _, side := range []float64{-1, 1} {
			p := post{i, side, float64(i)*gap + 0.03*rng.NormFloat64(), side*half + 0.03*rng.NormFloat64()}
			posts = append(posts, p)
			lms = append(lms, fusion.Landmark{ID: name(i, side), XM: float64(i) * gap, YM: side * half})
		}
	}
	cfg := fusion.Config{Recovery: fusion.Recovery{Enabled: true}, Landmarks: lms, LandmarkPositionStdM: 0.03,
		Sensors: []fusion.Sensor{{ID: "camera", Kind: fusion.FixLandmark,
			Cov: []float64{rangeStd * rangeStd, 0, 0, bearingStd * bearingStd}}}}
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	var truth estimator.Pose
	step := estimator.Step{ForwardM: 0.003} // 0.3 m/s at 100 Hz
	for k := int64(0); k < 3000; k++ {
		t0, t1 := k*10e6, (k+1)*10e6
		truth = estimator.Advance(truth, step)
		if k == 1500 {
			truth.X += moveM
		}
		r.AddOdometry(fusion.Odometry{StartNs: t0, StampNs: t1, Step: &step})
		if k%20 != 19 {
			continue
		}
		for _, p := range posts {
			dx, dy := p.x-truth.X, p.y-truth.Y
			rg, b := math.Hypot(dx, dy), estimator.Wrap(math.Atan2(dy, dx)-truth.Heading)
			if rg < 1 || rg > 7 || math.Abs(b) > 0.6 {
				continue
			}
			rg += rangeStd * rng.NormFloat64()
			b += bearingStd * rng.NormFloat64()
			id, wrong := name(p.i, p.side), renamed && k >= 1500 && k < 1700
			if wrong {
				id = name(p.i+1, p.side)
			}
			res := r.AddFix(fusion.Fix{StampNs: t1, SensorID: "camera", Kind: fusion.FixLandmark, LandmarkID: id, RangeM: &rg, BearingRad: &b})
			if wrong && res.Verdict == fusion.VerdictApplied {
				misApplied++
			}
			for _, e := range res.Events {
				if e.Kind == fusion.EventMoveRecovered {
					recoveries++
					t.Logf("%s at %.2f s", e.Detail, float64(e.StampNs)*1e-9)
				}
			}
		}
	}
	p := r.Pose().Pose
	return recoveries, misApplied, math.Hypot(p.X-truth.X, p.Y-truth.Y)
}

// TestRenamedLandmarksNotAMove: both posts of a frame read for 2 s as
// their neighbours one spacing along agree on a pose 5 m along, from two
// landmarks, as a carry there would; but the estimate explains the same
// refused fixes as readings of the posts its landmark blocks track, under
// other names (their joint cost at the estimate within the relocation's
// own chi-square quantile: joint compatibility, Neira and Tardos 2001,
// from memory), so the robot is not reseeded: no recovery, no misnamed fix
// applied, the estimate where it was. Before, it was reseeded 5 m along,
// the misnamed fixes were applied (16), and a second recovery brought it
// back (the orchard carrier's seeds 518, 536 and 539 of 40: 12, 5 and 15
// misread fixes applied; DEVELOPERS.md, "Design: Gating and recovery",
// renamed views). A robot set down 2.4 m along, whose readings no tracked
// post explains, is still reseeded, and so is one set down exactly a
// spacing along, whose view is the tracked one renamed, once its
// candidates are no longer so explained.
func TestRenamedLandmarksNotAMove(t *testing.T) {
	rec, mis, e := renamedRun(t, true, 0)
	if rec != 0 || mis != 0 || e > 0.2 {
		t.Errorf("posts renamed for 2 s: %d recoveries, %d misnamed fixes applied, final error %.2f m; want none, none, within 0.2 m", rec, mis, e)
	}
	for _, move := range []float64{2.4, 5} {
		if rec, _, e := renamedRun(t, false, move); rec == 0 || e > 0.2 {
			t.Errorf("set down %.1f m along: %d recoveries, final error %.2f m; want a recovery, within 0.2 m", move, rec, e)
		}
	}
}
