package calib

import (
	"strings"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// finalPosition95 runs the drive-wheel cart's run of injected (60 s) through
// a robot configured by cfg and returns its 95% position radius at the end.
func finalPosition95(t *testing.T, cfg fusion.Config) float64 {
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	sm := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 5, DurationS: 60, OutlierFraction: 0.05,
		Errors: fusiontest.Errors{WheelScales: []float64{0, 0.03}, CameraStampLateNs: 80e6}})
	for {
		in, more := sm.Next()
		if !more {
			break
		}
		switch {
		case in.Odometry != nil:
			r.AddOdometry(*in.Odometry)
		case in.Heading != nil:
			r.AddHeading(*in.Heading)
		case in.Fix != nil:
			r.AddFix(*in.Fix)
		}
	}
	return r.Pose().Position95M
}

// TestSilentMountKeepsItsStd: a run that only drives straight (15 s) says
// next to nothing about the camera mount's x and y (standard errors of
// half a metre against the fit's weak prior of a metre). Their mount_std
// keeps its configured value, and the note says so; written as the
// mount's uncertainty, they kept the filter's position uncertain by as
// much for the rest of the run (a consider state is never learnt).
func TestSilentMountKeepsItsStd(t *testing.T) {
	run, cfg := injected(5, 15)
	fit, err := FitSystematic(cfg, run.odo, run.fixes, SystematicOptions{})
	if err != nil {
		t.Fatal(err)
	}
	var se [2]float64
	for k, kind := range []ParamKind{MountX, MountY} {
		p, _ := fit.Param(kind, 0)
		if se[k] = p.StdErr; p.Determined || p.StdErr <= silentMount*p.Bound {
			t.Fatalf("%s: standard error %.3g (determined %v); the case needs one past %g", p.Name, p.StdErr, p.Determined, silentMount*p.Bound)
		}
	}
	got := fit.Config.Sensors[0].MountStd
	if got[0] != cfg.Sensors[0].MountStd[0] || got[1] != cfg.Sensors[0].MountStd[1] {
		t.Errorf("mount_std %v, want x and y as configured, %v", got, cfg.Sensors[0].MountStd)
	}
	if !strings.Contains(fit.MountStdNote, "mount.x_m") || !strings.Contains(fit.MountStdNote, "mount.y_m") {
		t.Errorf("note %q does not name the mount's x and y", fit.MountStdNote)
	}

	// The consequence on the whole run. The limit is ours: a camera at
	// 10 Hz that sees the cart's pose to a few centimetres keeps the 95%
	// radius to centimetres.
	radius := finalPosition95(t, fit.Config)
	wide := fit.Config
	wide.Sensors = append([]fusion.Sensor(nil), fit.Config.Sensors...)
	wide.Sensors[0].MountStd[0], wide.Sensors[0].MountStd[1] = se[0], se[1]
	wideRadius := finalPosition95(t, wide)
	t.Logf("95%% radius at the end: %.3f m as written, %.3f m with the standard errors as mount_std", radius, wideRadius)
	if radius > 0.05 {
		t.Errorf("with the written configuration the 95%% radius is %.3f m at the end", radius)
	}
	if wideRadius < 3*radius {
		t.Errorf("the case does not show the harm: %.3f m with the standard errors as mount_std", wideRadius)
	}
}
