package calib

import (
	"os"
	"strconv"
	"fmt"
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

func TestSystematicMCExplore(t *testing.T) {
	segS, _ := strconv.ParseFloat(os.Getenv("SEG"), 64)
	late, _ := strconv.ParseFloat(os.Getenv("LATE"), 64)
	ws, _ := strconv.ParseFloat(os.Getenv("WS"), 64)
	for seed := uint64(1); seed <= 10; seed++ {
		sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: seed, DurationS: 150, OutlierFraction: 0.05,
			Errors: fusiontest.Errors{WheelScales: []float64{0, ws}, CameraStampLateNs: int64(late * 1e9)}}
		r := simulateSys(sc)
		if os.Getenv("INIT") != "" {
			r.cfg.Sensors[0].LatencyNs = int64(late * 1e9)
		}
		fit, err := FitSystematic(r.cfg, r.odo, r.fixes, SystematicOptions{SegmentS: segS})
		if err != nil {
			t.Fatal(err)
		}
		truth := []float64{1, 1 / (1 + ws), 1, 0.15, 0, 0, late}
		s := ""
		for j, p := range fit.Params {
			s += fmt.Sprintf(" %+.2f(%.4f)", (p.Fitted-truth[j])/p.StdErr, p.StdErr)
		}
		t.Logf("seed %d its %d s2 %.2f:%s", seed, fit.Iterations, fit.Sigma2, s)
	}
}
