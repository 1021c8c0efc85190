package calib_test

import (
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/calib"
	"reckon.example/fusion/fusiontest"
)

// TestHonestGyroBiasHorizon: reckon imu-noise's recipe for a gyro's bias
// instability B (IMUTerms, a random walk of B^2 T per second of the IMU
// offset) is honest with the horizon T that OffsetHorizon solves, the time
// constant of the offset's estimate, and overconfident with the time
// between fixes, which the recipe's documentation named before. The Monte
// Carlo NEES test (Bar-Shalom, Li and Kirubarajan, Estimation with
// Applications to Tracking and Navigation, 2001, sec. 5.4.2; 30 runs of
// 60 s, band from gonum stat/distuv) on fusion's honesty case gyro-bias:
// B = 3e-4 rad/s, pose fixes of 0.02 rad heading at 3.3 Hz (T 11 s against
// 0.3 s).
func TestHonestGyroBiasHorizon(t *testing.T) {
	const b, camStd, camHz = 3e-4, 0.02, 10 / 3.0 // the case's bias and camera (fusiontest's default heading)
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, CameraHz: camHz, Errors: fusiontest.Errors{GyroBiasRadPerS: b}}
	sc.Seed, sc.DurationS = 300, 60
	nz := calib.Noise{B: calib.Term{Coef: b, Found: true}}
	horizon, ok := nz.OffsetHorizon(camStd*camStd, 1/camHz)
	if !ok || horizon < 5 || horizon > 20 {
		t.Fatalf("horizon %v s (ok %v), want about 11", horizon, ok)
	}
	nees := func(h float64) fusiontest.NEESResult {
		res, err := fusiontest.MonteCarloNEES(sc, 30, 500e6, func(sm *fusiontest.Sim) fusion.Config {
			cfg := sm.WhiteConfig()
			cfg.Noise.IMUOffsetVarRad2PerS += nz.IMUTerms(h, 0.5).OffsetVarRad2PerS
			return cfg
		})
		if err != nil {
			t.Fatal(err)
		}
		t.Logf("horizon %.3g s: %v", h, &res)
		return res
	}
	if res := nees(horizon); !res.Consistent(0.85) {
		t.Errorf("horizon %.1f s: inconsistent: %v", horizon, &res)
	}
	if res := nees(1 / camHz); res.Consistent(0.5) || res.Mean <= res.Hi {
		t.Errorf("horizon %.1f s, the time between fixes: passes the NEES test: %v", 1/camHz, &res)
	}
}
