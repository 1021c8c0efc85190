package fusion_test

import (
	"os"
	"slices"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// The honesty tests run the Monte Carlo NEES test (Bar-Shalom, Li and
// Kirubarajan, Estimation with Applications to Tracking and Navigation,
// 2001, sec. 5.4.2: the average NEES of N runs lies in the two-sided 95%
// band [chi2_{3N}(0.025)/N, chi2_{3N}(0.975)/N], quantiles from gonum
// stat/distuv) with each of the simulator's real error processes switched
// on. By default each case is 30 runs of 60 simulated seconds (about a
// second or two of one core); RECKON_MONTE_CARLO=long runs 200 runs of 120 s:
//
//	RECKON_MONTE_CARLO=long go test -run Honest -v -timeout 30m ./fusion

// honestyCase is one error process and the scenario that shows it.
type honestyCase struct {
	name string
	sc   fusiontest.Scenario
	// gated: the white filter's 99% gate refuses most of the process's
	// large errors, so its NEES stays near the band; the failure shows as a
	// gated fraction far above the gate's 1% instead.
	gated bool
	// conservative: the true model describes the process only on
	// average (a bias as a random walk), erring on the safe side: the
	// case passes with 75% of checkpoints inside the band if none lies
	// above it.
	conservative bool
}

// honestyCases are the error processes of issue 9's recordings, each alone,
// with a camera at 3.3 Hz (fixes 0.3 s apart) so that odometry matters
// between fixes. Landmark cases see 16 markers along the aisles.
func honestyCases() []honestyCase {
	landmarks := func(l fusiontest.Layout, e fusiontest.Errors) fusiontest.Scenario {
		return fusiontest.Scenario{Layout: l, IMU: true, MarkerCount: 16, CameraHz: 10 / 3.0, Errors: e}
	}
	pose := func(e fusiontest.Errors) fusiontest.Scenario {
		return fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, CameraHz: 10 / 3.0, Errors: e}
	}
	return []honestyCase{
		// exp(-0.3/2.85) = 0.90: consecutive fixes correlate 0.9.
		{name: "gauss-markov-pose", sc: pose(fusiontest.Errors{CameraTauS: 2.85})},
		{name: "gauss-markov-landmark", sc: landmarks(fusiontest.DriveWheelTurn, fusiontest.Errors{CameraTauS: 2.85})},
		// The stated deviation is the core's: a robust fit of real errors.
		{name: "student-t-3", sc: pose(fusiontest.Errors{CameraTailDOF: 3, CameraTailCore: true}), gated: true},
		{name: "contaminated-5pct-5x", sc: pose(fusiontest.Errors{CameraContamination: 0.05}), gated: true},
		{name: "odometry-scale", sc: landmarks(fusiontest.DriveWheelTurn, fusiontest.Errors{ForwardScale: 0.06, TurnScale: 0.10})},
		{name: "commanded-per-second", sc: landmarks(fusiontest.Commanded, fusiontest.Errors{})},
		{name: "commanded-scale", sc: landmarks(fusiontest.Commanded, fusiontest.Errors{ForwardScale: -0.08, TurnScale: 0.12})},
		// A 2% gyro scale error, the true model a random walk of the IMU
		// offset of 4e-4 rad^2 per radian turned.
		{name: "gyro-scale", sc: pose(fusiontest.Errors{GyroScale: 0.02}), conservative: true},
		// A gyro's rate bias of 3e-4 rad/s (a standard deviation over
		// runs), the true model a random walk of the IMU offset spread over
		// the offset's time constant.
		{name: "gyro-bias", sc: pose(fusiontest.Errors{GyroBiasRadPerS: 3e-4})},
		// An IMU stamped 40 ms after it read its heading.
		{name: "imu-late", sc: pose(fusiontest.Errors{IMUStampLateNs: 40e6})},
		// Markers 3 cm off the map in each axis (placed by tape measure).
		{name: "landmark-survey", sc: landmarks(fusiontest.DriveWheelTurn, fusiontest.Errors{LandmarkSurveyM: 0.03})},
	}
}

// monteCarloSize returns the runs and the simulated seconds per run.
func monteCarloSize() (int, float64) {
	if os.Getenv("RECKON_MONTE_CARLO") == "long" {
		return 200, 120
	}
	return 30, 60
}

// honestyNEES runs one case's Monte Carlo NEES test.
func honestyNEES(t *testing.T, c honestyCase, config func(*fusiontest.Sim) fusion.Config) fusiontest.NEESResult {
	t.Helper()
	runs, dur := monteCarloSize()
	sc := c.sc
	sc.Seed, sc.DurationS = 300, dur
	res, err := fusiontest.MonteCarloNEES(sc, runs, 500e6, config)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("%s: %v", c.name, &res)
	return res
}

// TestHonestWhiteModelFails: with each error process on, the filter with
// white-noise assumptions fails the NEES test visibly: its mean NEES lies
// outside the band and fewer than half of the checkpoints lie inside.
// This shows that the test can fail. For contamination at five sigma, and
// for Student-t errors of 3 degrees of freedom (a whole fix spoilt at a
// time, the simulator's multivariate Student-t), the 99% gate refuses most
// large errors, so the NEES test passes or nearly does (mean 3.83 for the
// Student-t); the process shows as a gated fraction more than three times
// the gate's 1% (5.2% and 14.0%: the overconfident sensor of issue 9,
// item 9).
func TestHonestWhiteModelFails(t *testing.T) {
	for _, c := range honestyCases() {
		t.Run(c.name, func(t *testing.T) {
			res := honestyNEES(t, c, (*fusiontest.Sim).WhiteConfig)
			if c.gated {
				if g := res.GatedFraction(); g < 3*0.01 {
					t.Errorf("%.1f%% of fixes gated, want over 3%%", 100*g)
				}
				return
			}
			if res.Consistent(0.5) || (res.Mean >= res.Lo && res.Mean <= res.Hi) {
				t.Errorf("the white-noise filter passes the NEES test: %v", &res)
			}
		})
	}
}

// TestHonestTrueModel: with each error process on, the filter configured
// with the true error model (fusiontest's TrueModelConfig) keeps the Monte
// Carlo NEES inside the band (85% of checkpoints, allowing for their
// correlation within a run, and the mean). Measured with 30 runs of 60 s,
// band [2.19, 3.94]: mean 3.21 and 90% inside (Gauss-Markov pose fixes),
// 3.01 and 94% (Gauss-Markov landmarks), 3.13 and 96% (Student-t), 2.98
// and 99% (contamination, Huber), 2.84 and 92% (scale states), 3.28 and
// 88% (noise per second), 3.08 and 92% (commanded with scale), 2.63
// and 84% (a 2% gyro scale error under a random walk of the IMU offset per
// radian turned; every checkpoint outside lies below the band: the walk
// describes the scale's bias on average, on the safe side), 2.90 and 96%
// (a gyro's rate bias, its walk spread over the offset's time constant).
func TestHonestTrueModel(t *testing.T) {

	for _, c := range honestyCases() {
		t.Run(c.name, func(t *testing.T) {
			res := honestyNEES(t, c, (*fusiontest.Sim).TrueModelConfig)
			if c.conservative {
				if !res.Consistent(0.75) || slices.Max(res.Avg) > res.Hi {
					t.Errorf("inconsistent, or above the band at some checkpoint: %v (largest average %.2f)", &res, slices.Max(res.Avg))
				}
				return
			}
			if !res.Consistent(0.85) {
				t.Errorf("inconsistent: %v", &res)
			}
		})
	}
}

// TestHonestDefaultOffsetWalk: the default walk of the IMU offset
// (fusion.DefaultNoise, 1e-6 rad^2/s) keeps the filter honest for a gyro
// drifting 3e-4 rad/s (the case gyro-bias: Monte Carlo NEES inside the
// band, Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2), and for a gyro
// without drift errs on the safe side only (mean NEES not above the band),
// in imu_mode absolute (the case's free-wheel cart) and rotation (the
// gyro-turn cart, where the walk is the heading's). Measured: 2.94 with 96%
// of checkpoints inside and 2.55 with 82% (absolute), 3.28 with 93% and
// 2.61 with 70% (rotation; 8.32 with the former default of 1e-7).
func TestHonestDefaultOffsetWalk(t *testing.T) {
	withDefault := func(sm *fusiontest.Sim) fusion.Config {
		cfg := sm.WhiteConfig()
		cfg.Noise.IMUOffsetVarRad2PerS = fusion.DefaultNoise().IMUOffsetVarRad2PerS
		return cfg
	}
	for _, c := range honestyCases() {
		if c.name != "gyro-bias" {
			continue
		}
		for _, layout := range []fusiontest.Layout{fusiontest.FreeWheelTurn, fusiontest.GyroTurn} {
			c.sc.Layout, c.sc.GyroBiasRadPerS = layout, 3e-4
			if res := honestyNEES(t, c, withDefault); !res.Consistent(0.85) {
				t.Errorf("layout %v, drifting gyro: inconsistent: %v", layout, &res)
			}
			c.sc.GyroBiasRadPerS = 0
			if res := honestyNEES(t, c, withDefault); res.Mean > res.Hi {
				t.Errorf("layout %v, gyro without drift: overconfident: %v", layout, &res)
			}
		}
	}
}
