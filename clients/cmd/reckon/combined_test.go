package main

import (
	"context"
	"os"
	"path/filepath"
	"strconv"
	"testing"

	"reckon.example/fusion/fusiontest"
)

// combinedScenario is five minutes of the drive-wheel cart with an
// absolute IMU and a camera on 16 aisle markers with several of the
// simulator's real error processes at once: the wheels 2% and -1.5% off in
// scale, markers 3 cm off the map, camera errors 90% Gauss-Markov over
// 2.5 s, the gyro drifting (3e-4 rad/s, a draw per run), the IMU stamped
// 30 ms after its reading, 2% of fixes metres off, quantised counts.
func combinedScenario(seed uint64) fusiontest.Scenario {
	return fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: seed, IMU: true, DurationS: 300, MarkerCount: 16, CameraHz: 10 / 3.0,
		OutlierFraction: 0.02, SensorCovariance: true, Counts: true,
		Errors: fusiontest.Errors{CameraTauS: 2.5, CameraCorrelated: 0.9, LandmarkSurveyM: 0.03, GyroBiasRadPerS: 3e-4, IMUStampLateNs: 30e6,
			WheelScales: []float64{0.02, -0.015}}}
}

// TestCombinedErrors plays the user's workflow (calibrate, then tune
// -model, neither with the truth) on combinedScenario from the simulator's
// white configuration, and scores each configuration against the truth as
// reckon review does (the fraction of the truth inside the position's 95%
// region, chi-square of 2 degrees of freedom, gonum distuv): the white
// configuration is overconfident, the tuned one must hold at least 0.90.
// Session 14, seeds 1 to 3 (white, calibrated, tuned; inside the 95% region
// filtered / smoothed, and the filtered RMS):
//
//	seed 1: 0.115 / 0.055, 0.378 / 0.229, 0.998 / 0.994; 0.350, 0.270, 0.183 m
//	seed 2: 0.167 / 0.073, 0.292 / 0.296, 1.000 / 1.000; 0.248, 0.238, 0.068 m
//	seed 3: 0.733 / 0.642, 0.847 / 0.797, 1.000 / 1.000; 0.064, 0.049, 0.090 m
//
// Tune chose the IMU latency (35, 30 and 30 ms for 30) and a survey error
// (fitted 6.4, 6.1 and 22.6 cm for 3), and the camera's Gauss-Markov part
// on seeds 2 and 3: honest, but on seed 3 far on the safe side, at twice
// the calibrated configuration's error: the survey error takes up what the
// calibration left (a known limit, DEVELOPERS.md, "Design: Landmark survey
// error"). A minute or three of calibrate and tune
// a seed, so it runs only with RECKON_COMBINED=n, for n seeds.
func TestCombinedErrors(t *testing.T) {
	n, _ := strconv.Atoi(os.Getenv("RECKON_COMBINED"))
	if n <= 0 {
		t.Skip("RECKON_COMBINED=n runs n five-minute runs calibrated and tuned")
	}
	for seed := uint64(1); seed <= uint64(n); seed++ {
		t.Run(strconv.FormatUint(seed, 10), func(t *testing.T) {
			dir := t.TempDir()
			cfg, samples, truth := writeRecording(t, dir, combinedScenario(seed), (*fusiontest.Sim).WhiteConfig)
			white := score(t, dir, cfg, samples, truth)
			t.Logf("white: RMS %.3f / %.3f m, inside 95%%: %.3f / %.3f", white.FilteredRMSM, white.SmoothedRMSM, white.FilteredInside95, white.SmoothedInside95)
			ctx := context.Background()
			cal, tuned := filepath.Join(dir, "calibrated.yaml"), filepath.Join(dir, "tuned.yaml")
			if out, errs, code := runCode(t, ctx, "", "calibrate", "-config", cfg, "-samples", samples, "-out", cal); code != 0 {
				t.Fatalf("calibrate: exit %d: %s\n%s", code, errs, out)
			}
			c := score(t, dir, cal, samples, truth)
			t.Logf("calibrated: RMS %.3f / %.3f m, inside 95%%: %.3f / %.3f", c.FilteredRMSM, c.SmoothedRMSM, c.FilteredInside95, c.SmoothedInside95)
			out, errs, code := runCode(t, ctx, "", "tune", "-model", "-config", cal, "-out", tuned, samples)
			if code != 0 {
				t.Fatalf("tune: exit %d: %s\n%s", code, errs, out)
			}
			t.Logf("tune:\n%s", out)
			got := score(t, dir, tuned, samples, truth)
			t.Logf("tuned: RMS %.3f / %.3f m, inside 95%%: %.3f / %.3f", got.FilteredRMSM, got.SmoothedRMSM, got.FilteredInside95, got.SmoothedInside95)
			if got.FilteredInside95 < goalInside95 || got.SmoothedInside95 < goalInside95 {
				t.Errorf("tuned: %.3f / %.3f of the truth inside the 95%% region, below %.2f", got.FilteredInside95, got.SmoothedInside95, goalInside95)
			}
		})
	}
}
