package calib

import (
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// sysRun is a simulated run's odometry and fixes with the configuration
// that describes the simulated robot exactly.
type sysRun struct {
	cfg   fusion.Config
	odo   []fusion.Odometry
	fixes []fusion.Fix
}

func simulateSys(sc fusiontest.Scenario) sysRun {
	sm := fusiontest.New(sc)
	r := sysRun{cfg: sm.Config()}
	for {
		in, ok := sm.Next()
		if !ok {
			return r
		}
		switch {
		case in.Odometry != nil:
			r.odo = append(r.odo, *in.Odometry)
		case in.Fix != nil:
			r.fixes = append(r.fixes, *in.Fix)
		}
	}
}

func TestSystematicExplore(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 5, DurationS: 300, OutlierFraction: 0.05,
		Errors: fusiontest.Errors{WheelScales: []float64{0, 0.03}, CameraStampLateNs: 80e6}}
	r := simulateSys(sc)
	cfg := r.cfg
	cfg.Wheels[0].YM *= 1.02
	cfg.Wheels[1].YM *= 1.02
	cfg.Sensors[0].Mount.X += 0.03
	cfg.Sensors[0].Mount.Heading += 0.035
	fit, err := FitSystematic(cfg, r.odo, r.fixes, SystematicOptions{})
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("fixes %d outliers %d segs %d s2 %.3f its %d conv %v", fit.Fixes, fit.Outliers, fit.Segments, fit.Sigma2, fit.Iterations, fit.Converged)
	for _, p := range fit.Params {
		t.Logf("%-40s conf %9.5f fit %9.5f se %.5f det %v %s", p.Name, p.Configured, p.Fitted, p.StdErr, p.Determined, p.Why)
	}
}
