package fusion_test

import (
	"math/rand/v2"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// mountErrorConfig returns the simulator's true model with the camera's
// mount off by a random constant drawn anew for each run (x and y with
// standard deviation sxy metres, heading sh radians), and with the
// configuration's mount_std set to those deviations when declared.
func mountErrorConfig(sxy, sh float64, declared bool) func(*fusiontest.Sim) fusion.Config {
	rng := rand.New(rand.NewPCG(17, 71))
	return func(s *fusiontest.Sim) fusion.Config {
		c := s.TrueModelConfig()
		c.Sensors = append([]fusion.Sensor(nil), c.Sensors...)
		m := &c.Sensors[0].Mount
		m.X += sxy * rng.NormFloat64()
		m.Y += sxy * rng.NormFloat64()
		m.Heading += sh * rng.NormFloat64()
		if declared {
			c.Sensors[0].MountStd = [3]float64{sxy, sxy, sh}
		}
		return c
	}
}

// TestMountStdConsistent: a camera whose configured mount is off by a
// random constant (2 cm in x and y, 0.02 rad in heading, drawn for each
// run) leaves the filter inconsistent when the mount is taken as exact,
// and consistent when the configuration declares the mount's standard
// deviations (sensors[i].mount_std), which the filter carries as consider
// states (Schmidt-Kalman; S. F. Schmidt, 1966; A. Gelb, Applied Optimal
// Estimation, 1974, sec. 7). The Monte Carlo NEES test of the honesty
// tests (Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2; band from gonum
// distuv), landmark fixes at 3.3 Hz from 16 markers on the drive-wheel
// cart with an IMU; each run draws its own mount error, so the average
// over runs is over the mount's distribution too.
func TestMountStdConsistent(t *testing.T) {
	runs, dur := monteCarloSize()
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, CameraHz: 10 / 3.0, Seed: 900, DurationS: dur}
	for _, declared := range []bool{true, false} {
		res, err := fusiontest.MonteCarloNEES(sc, runs, 500e6, mountErrorConfig(0.02, 0.02, declared))
		if err != nil {
			t.Fatal(err)
		}
		t.Logf("mount_std declared %v: %v", declared, &res)
		if declared && !res.Consistent(0.85) {
			t.Errorf("with mount_std: inconsistent: %v", &res)
		}
		if !declared && (res.Consistent(0.5) || res.Mean <= res.Hi) {
			t.Errorf("the mount taken as exact passes the NEES test: %v", &res)
		}
	}
}
