package calib

import (
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestRegisterAnchor: registerAnchor recovers a rigid motion exactly from
// points it moved (the least-squares rigid motion of two point sets that
// differ by one is that motion, S. Umeyama, IEEE PAMI 13(4), 1991), also
// with a quarter of the points metres off, and, when the points lie within
// a few centimetres of each other (one landmark seen again and again),
// keeps the heading it is given and puts the points' median where they
// are.
func TestRegisterAnchor(t *testing.T) {
	truth := estimator.Pose{X: 12.5, Y: -3.25, Heading: 2.4}
	rng := rand.New(rand.NewPCG(3, 4))
	var local, world [][2]float64
	for range 24 {
		l := [2]float64{rng.Float64()*8 - 4, rng.Float64()*6 - 3}
		w := estimator.Compose(truth, estimator.Pose{X: l[0], Y: l[1]})
		local, world = append(local, l), append(world, [2]float64{w.X, w.Y})
	}
	near := func(a estimator.Pose, tol float64) bool {
		return math.Abs(a.X-truth.X) < tol && math.Abs(a.Y-truth.Y) < tol && math.Abs(estimator.Wrap(a.Heading-truth.Heading)) < tol
	}
	if a := registerAnchor(local, world, 0); !near(a, 1e-9) {
		t.Errorf("exact points: %+v, want %+v", a, truth)
	}
	bad := [][2]float64{}
	for i, w := range world {
		if i%4 == 0 {
			w = [2]float64{w[0] + 3 + rng.Float64()*5, w[1] - 2 - rng.Float64()*5}
		}
		bad = append(bad, w)
	}
	if a := registerAnchor(local, bad, 0); !near(a, 1e-9) {
		t.Errorf("a quarter of the points metres off: %+v, want %+v", a, truth)
	}
	var one, oneW [][2]float64
	for range 10 {
		l := [2]float64{1 + rng.Float64()*0.02, 2 + rng.Float64()*0.02}
		w := estimator.Compose(truth, estimator.Pose{X: l[0], Y: l[1]})
		one, oneW = append(one, l), append(oneW, [2]float64{w.X, w.Y})
	}
	a := registerAnchor(one, oneW, truth.Heading+0.3)
	if a.Heading != truth.Heading+0.3 {
		t.Errorf("one landmark: heading %.4f, want the one given (%.4f)", a.Heading, truth.Heading+0.3)
	}
	// The points' median lands on its place: the anchor moved about it.
	p := estimator.Compose(a, estimator.Pose{X: one[0][0], Y: one[0][1]})
	if math.Hypot(p.X-oneW[0][0], p.Y-oneW[0][1]) > 0.05 {
		t.Errorf("one landmark: a point lands %.3f m from its place", math.Hypot(p.X-oneW[0][0], p.Y-oneW[0][1]))
	}
}

// landmarkRun is a ten-minute run of a robot that reports body steps from
// its commanded velocities, 11% and 12% longer than it drives and turns
// (the truth 0.89 and 0.88 of them), among 16 aisle markers seen in range
// and bearing 3.3 times a second (errors 95% Gauss-Markov with a time
// constant of 2.5 s, the rest Student-t of 3 degrees of freedom, 3% of
// fixes metres off), with the configuration a user would write: the right
// map and mounts, no scales, white camera noise of a plausible size.
func landmarkRun(seed uint64) (sysRun, fusion.Config) {
	sc := fusiontest.Scenario{Layout: fusiontest.Commanded, Seed: seed, DurationS: 600, MarkerCount: 16, FigureEight: true, CameraHz: 10 / 3.0,
		OutlierFraction: 0.03, SensorCovariance: true,
		Errors: fusiontest.Errors{CameraTauS: 2.5, CameraCorrelated: 0.95, CameraTailDOF: 3, ForwardScale: 1/0.89 - 1, TurnScale: 1/0.88 - 1}}
	r := simulateSys(sc)
	cfg := r.cfg
	cfg.Sensors = slices.Clone(cfg.Sensors)
	cfg.Noise.StepForwardVarM2PerM = 1e-4
	cfg.Noise.StepLeftVarM2PerM = 2.5e-5
	cfg.Noise.StepTurnVarRad2PerRad = 1e-3
	cfg.Sensors[0].Cov = []float64{0.03 * 0.03, 0, 0, 0.015 * 0.015}
	return r, cfg
}

// TestSystematicLandmarkStart: a run of landmarkRun on which the fit
// failed (seed 7; simulator truth). It started each segment's anchor where
// dead reckoning from the start of the run put it, with the scales 11% and
// 12% off: minutes in, its heading was off by any angle, and the fit
// settled with every fix tens of standard deviations off, a latency of
// -0.7 s and no standard errors. Now the fit's residual variance factor is
// near 1 (0.8 to 1.3) and its body-step scales lie within 3.5 standard
// errors of the truth (a loose bound: over 12 seeds the forward scale's
// RMS error over standard error is 1.23). Seed 11, whose fit got no
// standard errors once the anchors started from the fixes (an anchor free
// in one direction, its prior below the normal matrix's rounding), is
// TestRealDataGoal's run in clients/cmd/reckon, which calibrates it.
func TestSystematicLandmarkStart(t *testing.T) {
	if testing.Short() {
		t.Skip("a ten-minute fit")
	}
	for _, seed := range []uint64{7} {
		r, cfg := landmarkRun(seed)
		fit, err := FitSystematic(cfg, r.odo, r.fixes, SystematicOptions{})
		if err != nil {
			t.Errorf("seed %d: %v", seed, err)
			continue
		}
		t.Logf("seed %d: %d fixes, %d outliers, %d segments, s2 %.3f, %d iterations", seed, fit.Fixes, fit.Outliers, fit.Segments, fit.Sigma2, fit.Iterations)
		if !(fit.Sigma2 >= 0.8 && fit.Sigma2 <= 1.3) {
			t.Errorf("seed %d: residual variance factor %.3f, want 0.8 to 1.3", seed, fit.Sigma2)
		}
		for k, want := range map[ParamKind]float64{StepForwardScale: 0.89, StepTurnScale: 0.88} {
			p, ok := fit.Param(k, 0)
			if !ok || !p.Determined || math.Abs(p.Fitted-want) > 3.5*p.StdErr {
				t.Errorf("seed %d: %s %.4f +- %.4f (determined %v), truth %.2f", seed, p.Name, p.Fitted, p.StdErr, p.Determined, want)
			}
		}
	}
}
