package fusiontest

import (
	"math"
	"reflect"
	"testing"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// cameraErrors runs sc and returns each pose fix's error in x, y and
// heading, divided by the stated standard deviations, in fix order.
func cameraErrors(t *testing.T, sc Scenario) [][3]float64 {
	t.Helper()
	s := New(sc)
	var out [][3]float64
	for {
		in, ok := s.Next()
		if !ok {
			return out
		}
		if in.Fix == nil {
			continue
		}
		cam := estimator.Compose(sc.ToLocal(in.Truth), CameraMount())
		f := sc.ToLocal(estimator.Pose{X: in.Fix.XM, Y: in.Fix.YM, Heading: in.Fix.HeadingRad})
		out = append(out, [3]float64{(f.X - cam.X) / cameraStdM, (f.Y - cam.Y) / cameraStdM, estimator.Wrap(f.Heading-cam.Heading) / cameraStdRad})
	}
}

// TestGaussMarkovCamera: with a time constant of 2.85 s and fixes 0.3 s
// apart, consecutive errors correlate exp(-0.3/2.85) = 0.90 and keep the
// stated variance (stationary first-order Gauss-Markov process: Gelb,
// Applied Optimal Estimation, 1974, sec. 4.5). Over 1,200 s (about 420
// time constants) the sample variance has a relative standard error near
// sqrt(2 tau / T) = 0.12 per component; the tolerances are about three
// standard errors of the mean over the three components.
func TestGaussMarkovCamera(t *testing.T) {
	sc := Scenario{Layout: FreeWheelTurn, Seed: 3, DurationS: 1200, CameraHz: 10 / 3.0, Errors: Errors{CameraTauS: 2.85}}
	errs := cameraErrors(t, sc)
	want := math.Exp(-0.3 / 2.85)
	var rho, v float64
	for k := 0; k < 3; k++ {
		var s0, s1 float64
		for i := range errs {
			s0 += errs[i][k] * errs[i][k]
			if i > 0 {
				s1 += errs[i][k] * errs[i-1][k]
			}
		}
		rho += s1 / s0 / 3
		v += s0 / float64(len(errs)) / 3
	}
	t.Logf("%d fixes: lag-one correlation %.3f (want %.3f), variance %.3f of the stated", len(errs), rho, want, v)
	if math.Abs(rho-want) > 0.03 {
		t.Errorf("correlation %.3f, want %.3f", rho, want)
	}
	if math.Abs(v-1) > 0.2 {
		t.Errorf("variance %.3f of the stated, want 1", v)
	}
}

// TestHeavyTails: the fraction of camera errors beyond three stated
// standard deviations matches the error law's: a Student-t scaled to the
// stated deviation (tail probability from gonum stat/distuv.StudentsT) and
// a 5% contamination at five sigma (0.95 P(|z|>3) + 0.05 P(|z|>0.6)),
// within four binomial standard errors. Without them it is 0.27%.
func TestHeavyTails(t *testing.T) {
	normTail := func(x float64) float64 { return 2 * distuv.UnitNormal.Survival(x) }
	tTail := func(nu, x float64) float64 {
		return 2 * distuv.StudentsT{Mu: 0, Sigma: 1, Nu: nu}.Survival(x)
	}
	for _, c := range []struct {
		name string
		e    Errors
		want float64
	}{
		{"white", Errors{}, normTail(3)},
		{"student-t-5", Errors{CameraTailDOF: 5}, tTail(5, 3*math.Sqrt(5.0/3))},
		{"student-t-3-core", Errors{CameraTailDOF: 3, CameraTailCore: true}, tTail(3, 3)},
		{"contaminated", Errors{CameraContamination: 0.05}, 0.95*normTail(3) + 0.05*normTail(3.0/5)},
	} {
		t.Run(c.name, func(t *testing.T) {
			errs := cameraErrors(t, Scenario{Layout: FreeWheelTurn, Seed: 4, DurationS: 600, Errors: c.e})
			var beyond, n float64
			for _, e := range errs {
				for _, x := range e {
					n++
					if math.Abs(x) > 3 {
						beyond++
					}
				}
			}
			got := beyond / n
			se := math.Sqrt(c.want * (1 - c.want) / n)
			t.Logf("%.0f errors, %.2f%% beyond 3 sigma, want %.2f%% +- %.2f%%", n, 100*got, 100*c.want, 100*se)
			if math.Abs(got-c.want) > 4*se {
				t.Errorf("%.2f%% beyond 3 sigma, want %.2f%%", 100*got, 100*c.want)
			}
		})
	}
}

// TestOdometryScale: the reported forward travel and turn are the true ones
// times 1+ForwardScale and 1+TurnScale, for wheels (the mean of the two
// drive wheels; their difference over the 0.4 m track) and for commanded
// body steps. The truth's travel is its displacement along its mid-step
// heading; turns are compared over the 1 s windows that turn more than
// 0.2 rad (the route's turns run at 0.53 rad/s), the truth's counted with
// the sign of the reported turn, so that the truth's zero-mean noise (wheel
// noise, scrub, the commanded layout's noise per second) averages out: a
// few parts in a thousand for travel; for the commanded turn, the noise of
// 4e-4 rad^2/s over about 24 s of turning leaves a standard error of 0.008
// on the ratio, so it is allowed 0.02.
func TestOdometryScale(t *testing.T) {
	for _, l := range []Layout{DriveWheelTurn, Commanded} {
		t.Run(l.String(), func(t *testing.T) {
			sc := Scenario{Layout: l, Seed: 6, DurationS: 120, Errors: Errors{ForwardScale: 0.07, TurnScale: -0.12}}
			s := New(sc)
			var fwd, turn, trueFwd, trueTurn float64
			var winTurn, winTrue float64
			var n int
			var prev *estimator.Pose
			for {
				in, ok := s.Next()
				if !ok {
					break
				}
				if in.Odometry == nil {
					continue
				}
				var f, th float64
				if st := in.Odometry.Step; st != nil {
					f, th = st.ForwardM, st.TurnRad
				} else if tr := in.Odometry.TravelM; tr != nil {
					f, th = (tr[0]+tr[1])/2, (tr[1]-tr[0])/0.4
				}
				if prev != nil {
					dth := estimator.Wrap(in.Truth.Heading - prev.Heading)
					sh, ch := math.Sincos(prev.Heading + dth/2)
					fwd += f
					trueFwd += ch*(in.Truth.X-prev.X) + sh*(in.Truth.Y-prev.Y)
					winTurn += th
					winTrue += dth
					if n++; n%200 == 0 {
						if math.Abs(winTurn) > 0.2 {
							turn += math.Abs(winTurn)
							trueTurn += math.Copysign(1, winTurn) * winTrue
						}
						winTurn, winTrue = 0, 0
					}
				}
				p := in.Truth
				prev = &p
			}
			t.Logf("forward %.3f / %.3f m = %.4f, turn %.3f / %.3f rad = %.4f", fwd, trueFwd, fwd/trueFwd, turn, trueTurn, turn/trueTurn)
			if math.Abs(fwd/trueFwd-1.07) > 0.005 {
				t.Errorf("forward scale %.4f, want 1.07", fwd/trueFwd)
			}
			if math.Abs(turn/trueTurn-0.88) > 0.02 {
				t.Errorf("turn scale %.4f, want 0.88", turn/trueTurn)
			}
		})
	}
}

// TestCommandedNoisePerSecond: in the Commanded layout the truth departs
// from the command by white velocity noise: over 1 s windows of straight
// driving, the true travel minus the commanded travel has the variance
// CommandedForwardVarM2PerS, and the true turn the variance
// CommandedTurnVarRad2PerS (plus the heading random walk, 1e-7 rad^2/s). With
// about 440 windows the sample variance has a relative standard error of
// sqrt(2/440) = 0.067; the tolerance is 0.25.
func TestCommandedNoisePerSecond(t *testing.T) {
	s := New(Scenario{Layout: Commanded, Seed: 8, DurationS: 600})
	var prev *estimator.Pose
	var wf, wt, cmd, cmdTurn, sf, st float64
	var n, windows int
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		if in.Odometry == nil {
			continue
		}
		if prev != nil {
			dth := estimator.Wrap(in.Truth.Heading - prev.Heading)
			sh, ch := math.Sincos(prev.Heading + dth/2)
			wf += ch*(in.Truth.X-prev.X) + sh*(in.Truth.Y-prev.Y)
			wt += dth
			cmd += in.Odometry.Step.ForwardM
			cmdTurn += math.Abs(in.Odometry.Step.TurnRad)
		}
		p := in.Truth
		prev = &p
		if n++; n%200 == 0 {
			if cmdTurn == 0 && math.Abs(cmd-0.4) < 1e-9 { // a whole second of straight driving
				sf += (wf - cmd) * (wf - cmd)
				st += wt * wt
				windows++
			}
			wf, wt, cmd, cmdTurn = 0, 0, 0, 0
		}
	}
	vf, vt := sf/float64(windows), st/float64(windows)
	t.Logf("%d windows: forward %.3g m^2/s (want %.3g), turn %.3g rad^2/s (want %.3g)", windows, vf, CommandedForwardVarM2PerS, vt, CommandedTurnVarRad2PerS)
	if math.Abs(vf/CommandedForwardVarM2PerS-1) > 0.25 || math.Abs(vt/(CommandedTurnVarRad2PerS+1e-7)-1) > 0.25 {
		t.Errorf("noise per second: forward %.3g, turn %.3g", vf, vt)
	}
}

// TestFieldFrame: a run in a field frame moved by 100 m and rotated is the
// same run: its truth, fixes, map and start pose, taken back to the
// simulator's frame, equal the plain run's to 1e-9, and its odometry and
// IMU samples are identical.
func TestFieldFrame(t *testing.T) {
	for _, markers := range []bool{false, true} {
		plain := Scenario{Layout: FreeWheelTurn, IMU: true, Seed: 9, DurationS: 20, Markers: markers, OutlierFraction: 0.05,
			Errors: Errors{CameraTauS: 2, CameraTailDOF: 4}}
		moved := plain
		moved.FieldFrame = estimator.Pose{X: 100, Y: -60, Heading: 2.3}
		a, b := New(plain), New(moved)
		same := func(p, q estimator.Pose) bool {
			return math.Hypot(p.X-q.X, p.Y-q.Y) < 1e-9 && math.Abs(estimator.Wrap(p.Heading-q.Heading)) < 1e-9
		}
		if !same(a.Config().StartPose, moved.ToLocal(b.Config().StartPose)) {
			t.Errorf("start pose %+v, moved %+v", a.Config().StartPose, b.Config().StartPose)
		}
		for i, l := range b.Config().Landmarks {
			p := moved.ToLocal(estimator.Pose{X: l.XM, Y: l.YM})
			if m := a.Config().Landmarks[i]; math.Hypot(p.X-m.XM, p.Y-m.YM) > 1e-9 {
				t.Errorf("landmark %s at %+v, moved back %+v", m.ID, m, p)
			}
		}
		eachPair(t, a, b, func(n int, x, y Input) {
			if !same(x.Truth, moved.ToLocal(y.Truth)) {
				t.Fatalf("input %d: truth %+v, moved back %+v", n, x.Truth, moved.ToLocal(y.Truth))
			}
			switch {
			case x.Fix != nil && x.Fix.Kind == fusion.FixPose:
				fx := estimator.Pose{X: x.Fix.XM, Y: x.Fix.YM, Heading: x.Fix.HeadingRad}
				fy := moved.ToLocal(estimator.Pose{X: y.Fix.XM, Y: y.Fix.YM, Heading: y.Fix.HeadingRad})
				if !same(fx, fy) {
					t.Fatalf("input %d: fix %+v, moved back %+v", n, fx, fy)
				}
				x.Fix.XM, x.Fix.YM, x.Fix.HeadingRad = y.Fix.XM, y.Fix.YM, y.Fix.HeadingRad
			}
			x.Truth = y.Truth
			if !reflect.DeepEqual(x, y) {
				t.Fatalf("input %d differs: %+v, moved %+v", n, x, y)
			}
		})
	}
}

// TestAisleMarkers: the markers are as many as asked, their IDs distinct,
// and they lie on the bed edges beside the first aisles.
func TestAisleMarkers(t *testing.T) {
	for _, n := range []int{1, 10, 16, 20} {
		m := AisleMarkers(n)
		seen := map[string]bool{}
		for _, l := range m {
			if seen[l.ID] || l.XM <= 0 || l.XM >= 8 || l.YM < -0.75 || l.YM > 3.75 {
				t.Errorf("%d markers: %+v repeated or off the beds", n, l)
			}
			seen[l.ID] = true
		}
		if len(m) != n {
			t.Errorf("%d markers, want %d", len(m), n)
		}
	}
}
