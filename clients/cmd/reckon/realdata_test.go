package main

import (
	"context"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"reckon.example/clients/review"
	"reckon.example/fusion"
	"reckon.example/fusion/calib"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// realScenario is the real-data goal's kind of run on our simulator: a
// differential drive reporting body steps from its commanded velocities,
// the truth 0.89 of the commanded distance and 0.88 of the commanded turn
// (reported 1/0.89 and 1/0.88 times the truth), a camera giving range and
// bearing to 16 mapped markers whose errors are 95% Gauss-Markov with a
// time constant of 2.5 s (0.95 exp(-0.3/2.5) = 0.84 between sightings 0.3
// s apart), the rest Student-t of 3 degrees of freedom, and 3% of fixes
// metres off.
func realScenario(seed uint64, seconds float64) fusiontest.Scenario {
	return fusiontest.Scenario{Layout: fusiontest.Commanded, Seed: seed, DurationS: seconds, MarkerCount: 16, FigureEight: true, CameraHz: 10 / 3.0,
		OutlierFraction: 0.03, SensorCovariance: true,
		Errors: fusiontest.Errors{CameraTauS: 2.5, CameraCorrelated: 0.95, CameraTailDOF: 3,
			ForwardScale: 1/0.89 - 1, TurnScale: 1/0.88 - 1}}
}

// naiveConfig is the configuration a user would write for the run: the
// robot's map and mounts right, white camera noise of a plausible size
// (3 cm in range, 0.015 rad in bearing), no scale states, the body steps'
// noise guessed per metre and per radian.
func naiveConfig(s *fusiontest.Sim) fusion.Config {
	c := s.WhiteConfig()
	c.Noise.StepForwardVarM2PerM = 1e-4
	c.Noise.StepLeftVarM2PerM = 2.5e-5
	c.Noise.StepTurnVarRad2PerRad = 1e-3
	c.Sensors[0].Cov = []float64{0.03 * 0.03, 0, 0, 0.015 * 0.015}
	return c
}

// writeRecording writes the simulated run as the CLI reads it: the
// configuration as YAML, the samples as JSON Lines in arrival order, and
// the truth as CSV at every odometry sample.
func writeRecording(t *testing.T, dir string, sc fusiontest.Scenario, config func(*fusiontest.Sim) fusion.Config) (cfgPath, samples, truth string) {
	t.Helper()
	s := fusiontest.New(sc)
	cfgPath, samples, truth = filepath.Join(dir, "robot.yaml"), filepath.Join(dir, "run.jsonl"), filepath.Join(dir, "truth.csv")
	data, err := configYAML(convert.ConfigToProto(config(s)), "# a naive configuration")
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(cfgPath, data, 0o644); err != nil {
		t.Fatal(err)
	}
	writeSim(t, s, samples, truth)
	return cfgPath, samples, truth
}

// score reviews the run under the configuration at cfgPath against the
// truth, as reckon review does.
func score(t *testing.T, dir, cfgPath, samples, truth string) review.Summary {
	t.Helper()
	cfg, _ := readConfigFile(t, cfgPath)
	run, err := review.Analyze(review.Source{Samples: samples, Config: cfg, Truth: truth}, filepath.Join(dir, "review-"+filepath.Base(cfgPath)), review.Options{TempDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	return run.Summary
}

// readConfigFile loads the YAML configuration at path, as the wire message
// and as fusion's.
func readConfigFile(t *testing.T, path string) (*pb.RobotConfig, fusion.Config) {
	t.Helper()
	data, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	cp, cfg, err := convert.LoadConfigYAML(data)
	if err != nil {
		t.Fatalf("%s: %v", path, err)
	}
	return cp, cfg
}

// The real-data goal of issue 10 (measured by the maintainers on a public
// recording): from the recording alone, the tuned configuration's position
// RMS error at most 0.15 m filtered and 0.10 m smoothed, and at least 90%
// of the truth inside the 95% region.
const (
	goalFilteredRMSM = 0.15
	goalSmoothedRMSM = 0.10
	goalInside95     = 0.90
)

// TestRealDataGoal plays the real-data goal on the simulator
// (realScenario, ten minutes) as a user would: the recording and a naive
// configuration (naiveConfig) on disk, then reckon calibrate (which finds
// the body steps' scale bias and switches on the online scale states),
// then reckon tune -model on the calibrated configuration (which chooses
// a Gauss-Markov part and Student-t tails for the camera and body-step
// noise per second, then fits their levels), neither with the truth. Each
// configuration is scored against the truth as reckon review scores it
// (review.Summary: position RMS of the filtered and smoothed tracks, the
// fraction of truth inside the position's 95% region, whose boundary is
// the chi-square quantile of 2 degrees of freedom, gonum distuv). The
// naive configuration misses the coverage goal (0.04 of the truth inside
// its 95% region on this run); the tuned one meets both RMS goals (0.044
// m filtered, 0.021 m smoothed) and the coverage goal: 0.967 filtered and
// 0.967 smoothed inside (0.969 and 0.968 before the systematic fit
// predicted the expected position under the heading noise, session 11;
// 0.934 and 0.936 before it started its anchors from the fixes, session
// 10), where fusiontest's
// TrueModelConfig (the simulator's own processes) gives 0.94 and 0.93.
// Calibrate writes the
// mount's standard errors (mount_std), which the filter carries as
// consider states, and tune matches a correlated Student-t camera's
// covariance to a median that counts only its white part as heavy-tailed;
// without the second the run gave 0.899 and 0.903, below the goal, and
// without both 0.941 and 0.930 ("Design: Noise by likelihood", session 8).
// Before the variances the
// run does not determine were set to the upper ends of their likelihood
// intervals and the body-step levels fitted on the thinned run, it gave
// 0.886 and 0.872: the body steps' sideways noise, which the run does not
// determine, kept the naive guess (0.44 of the truth) ("Design: Noise by
// likelihood"). With RECKON_REALDATA_SEEDS=n it runs n runs over the
// goal's ranges instead (variedScenario).
func TestRealDataGoal(t *testing.T) {
	if testing.Short() {
		t.Skip("a ten-minute run calibrated, tuned and reviewed")
	}
	n, _ := strconv.Atoi(os.Getenv("RECKON_REALDATA_SEEDS"))
	if n <= 0 {
		realDataGoal(t, realScenario(11, 600), goalInside95)
		return
	}
	// The longer check: n runs whose scale biases, camera time constant
	// and tails are drawn over the goal's ranges (variedScenario); each
	// must reach the goal's RMS and 0.65 of the truth inside. With the
	// fit's expected path under the heading noise (session 11) seeds 1 to
	// 12 give 0.968 / 0.975, 0.884 / 0.900, 0.944 / 0.940, 0.991 / 0.993,
	// 0.978 / 0.965, 0.967 / 0.952, 0.913 / 0.918, 0.966 / 0.965, 0.981 /
	// 0.980, 0.992 / 0.984, 0.960 / 0.961 and 0.943 / 0.928 (mean 0.957
	// filtered, as before). Since the
	// systematic fit starts its anchors from the fixes (session 10) seeds
	// 1 to 12 give 0.969 / 0.977, 0.885 / 0.901, 0.943 / 0.937, 0.991 /
	// 0.993, 0.978 / 0.967, 0.965 / 0.960, 0.907 / 0.909, 0.966 / 0.965,
	// 0.981 / 0.981, 0.987 / 0.978, 0.963 / 0.964 and 0.943 / 0.929 (mean
	// 0.957 filtered against 0.961 before, the lowest 0.885 against 0.871,
	// one below 0.90 against two); calibrate gives 4 to 8% of the fixes no
	// weight, where it gave 17 to 24% before (the run has 3% metres off):
	// anchors started far off had lost their segments' fixes, and with
	// them the mount's x, kept as configured, which these runs configure
	// right. Seeds 2 and 3 fell (from 0.924 and 0.982): the mount's x is
	// now fitted, 1.8 standard errors off on seed 3, and the first pass
	// states the mount's standard errors 1.2 to 1.8 times too small
	// ("Design: Systematic parameters"). With the
	// mount's standard errors carried (session 8) seeds 1 to 8 gave 0.972
	// / 0.982, 0.924 / 0.923, 0.982 / 0.992, 0.991 / 0.992, 0.992 / 0.997, 0.997 /
	// 0.991, 0.882 / 0.873 (the mount's x 2.5 standard errors off) and
	// 0.964 / 0.955, and seeds 9 to 12 0.995 / 0.993, 0.994 / 0.994, 0.871
	// / 0.836 (its mount within a standard error; the camera's covariance
	// matched to 0.44 of its truth) and 0.971 / 0.973; calibrate and tune
	// again took seed 7 to 0.902 / 0.903 and seed 11 to 0.954 / 0.952.
	// Before (seeds 1 to 3
	// measured 0.914 / 0.920, 0.698 / 0.670 and 0.933 / 0.955; before the
	// upper ends and the thinned step fit 0.774 / 0.781, 0.338 / 0.297 and
	// 0.761 / 0.768). Seed 2 misses the goal: calibrate put the camera's
	// mount 1.9 cm and 9 mrad off ("Design: Noise by likelihood"). With
	// RECKON_REALDATA_RECALIBRATE set, calibrate runs again on the tuned
	// configuration, whose Gauss-Markov camera the systematic fit then
	// weights by: seeds 1 to 5 gave 0.914 / 0.917, 0.823 / 0.817 (the
	// mount back within a millimetre), 0.911 / 0.913, 0.990 / 0.978 and
	// 0.968 / 0.972 (before 0.992 / 0.977 and 0.930 / 0.926 for 4 and 5),
	// the default run 0.929 / 0.891, below the goal, so it is not the
	// default ("Design: Systematic parameters", "Correlated fix errors").
	// With RECKON_REALDATA_RETUNE set too, tune -model runs again on that
	// configuration (its Student-t camera now screened for gross errors on
	// its own distribution): seeds 1 to 3 gave 0.918 / 0.921, 0.859 /
	// 0.855 and 0.913 / 0.917. With the mount's standard errors carried
	// (session 8) the two together took the default run to 0.957 / 0.945
	// and seeds 7 and 11 to 0.902 / 0.903 and 0.954 / 0.952.
	for seed := uint64(1); seed <= uint64(n); seed++ {
		t.Run(fmt.Sprint(seed), func(t *testing.T) { realDataGoal(t, variedScenario(seed), 0.65) })
	}
}

// variedScenario is realScenario with the goal's ranges drawn from the
// seed: the truth 0.86 to 0.97 of the commanded distance and 0.81 to 0.99
// of the commanded turn, the camera's time constant 1 to 3 s, Student-t
// tails of 3 to 5 degrees of freedom, 1% to 5% of fixes metres off.
func variedScenario(seed uint64) fusiontest.Scenario {
	r := rand.New(rand.NewPCG(seed, 0x7e57))
	u := func(lo, hi float64) float64 { return lo + (hi-lo)*r.Float64() }
	sc := realScenario(seed, 600)
	sc.ForwardScale, sc.TurnScale = 1/u(0.86, 0.97)-1, 1/u(0.81, 0.99)-1
	sc.CameraTauS, sc.CameraTailDOF, sc.OutlierFraction = u(1, 3), 3+r.IntN(3), u(0.01, 0.05)
	return sc
}

func realDataGoal(t *testing.T, sc fusiontest.Scenario, reached float64) {
	dir := t.TempDir()
	cfg, samples, truth := writeRecording(t, dir, sc, naiveConfig)
	naive := score(t, dir, cfg, samples, truth)
	t.Logf("naive: RMS %.3f / %.3f m, inside 95%%: %.3f / %.3f", naive.FilteredRMSM, naive.SmoothedRMSM, naive.FilteredInside95, naive.SmoothedInside95)
	if naive.FilteredInside95 >= goalInside95 || naive.SmoothedInside95 >= goalInside95 {
		t.Errorf("the naive configuration meets the coverage goal (%.3f / %.3f inside): the test shows nothing", naive.FilteredInside95, naive.SmoothedInside95)
	}

	ctx := context.Background()
	cal, tuned := filepath.Join(dir, "calibrated.yaml"), filepath.Join(dir, "tuned.yaml")
	out, errs, code := runCode(t, ctx, "", "calibrate", "-config", cfg, "-samples", samples, "-out", cal)
	if code != 0 {
		t.Fatalf("calibrate: exit %d: %s\n%s", code, errs, out)
	}
	// The camera's errors are Gauss-Markov, the naive configuration white:
	// calibrate says its standard errors are too small and what to run
	// (calib.SensorWhiteness).
	if !strings.Contains(out, "repeat over time more than its configuration says") {
		t.Errorf("calibrate did not flag the camera's correlated residuals:\n%s", out)
	}
	t.Logf("calibrate:\n%s", out)
	if !strings.Contains(out, "calibration.scale false (default) -> true") {
		t.Errorf("calibrate did not switch on the scale states")
	}
	out, errs, code = runCode(t, ctx, "", "tune", "-model", "-config", cal, "-out", tuned, samples)
	if code != 0 {
		t.Fatalf("tune: exit %d: %s\n%s", code, errs, out)
	}
	t.Logf("tune:\n%s", out)
	if os.Getenv("RECKON_REALDATA_RECALIBRATE") != "" {
		// Calibrate again: the tuned configuration declares the camera's
		// Gauss-Markov part, which the systematic fit weights the fixes
		// by ("Design: Systematic parameters"), so the mount is fitted
		// again without counting the camera's correlated errors as
		// independent.
		again := filepath.Join(dir, "calibrated-again.yaml")
		out, errs, code = runCode(t, ctx, "", "calibrate", "-config", tuned, "-samples", samples, "-out", again)
		if code != 0 {
			t.Fatalf("calibrate again: exit %d: %s\n%s", code, errs, out)
		}
		t.Logf("calibrate again:\n%s", out)
		tuned = again
		if os.Getenv("RECKON_REALDATA_RETUNE") != "" {
			// And tune again, on the configuration calibrated again.
			retuned := filepath.Join(dir, "tuned-again.yaml")
			out, errs, code = runCode(t, ctx, "", "tune", "-model", "-config", again, "-out", retuned, samples)
			if code != 0 {
				t.Fatalf("tune again: exit %d: %s\n%s", code, errs, out)
			}
			t.Logf("tune again:\n%s", out)
			tuned = retuned
		}
	}
	got := score(t, dir, tuned, samples, truth)
	t.Logf("tuned: RMS %.3f / %.3f m, inside 95%%: %.3f / %.3f (goal: <= %.2f / %.2f m, >= %.2f inside)", got.FilteredRMSM, got.SmoothedRMSM,
		got.FilteredInside95, got.SmoothedInside95, goalFilteredRMSM, goalSmoothedRMSM, goalInside95)
	if got.FilteredRMSM > goalFilteredRMSM || got.SmoothedRMSM > goalSmoothedRMSM {
		t.Errorf("tuned: RMS %.3f / %.3f m, goal %.2f / %.2f m", got.FilteredRMSM, got.SmoothedRMSM, goalFilteredRMSM, goalSmoothedRMSM)
	}
	if got.FilteredInside95 < reached || got.SmoothedInside95 < reached {
		t.Errorf("tuned: %.3f / %.3f of the truth inside the 95%% region, below %.2f", got.FilteredInside95, got.SmoothedInside95, reached)
	}
	if got.FilteredInside95 < goalInside95 || got.SmoothedInside95 < goalInside95 {
		t.Logf("coverage goal %.2f not met (a known limit)", goalInside95)
	}
	_, tc := readConfigFile(t, tuned)
	cam := tc.Sensors[0]
	// The camera's tails are in its white part alone (5% of its
	// variance), which a varied run need not show: Student-t is asked
	// only of the default run.
	tails := cam.Robust == fusion.RobustStudentT || reached < goalInside95
	if !tc.Calibration.Scale || cam.CorrelatedFraction == 0 || !tails || tc.Noise.StepTurnVarRad2PerS == 0 {
		t.Errorf("tuned model: scale states %v, camera correlated %g robust %v, step turn per second %g; want the scale states, a Gauss-Markov Student-t camera and step noise per second",
			tc.Calibration.Scale, cam.CorrelatedFraction, cam.Robust, tc.Noise.StepTurnVarRad2PerS)
	}
}

// BenchmarkCalibrateTune10Min is the calibration and the noise fit of
// TestRealDataGoal's ten-minute run, as reckon calibrate and reckon tune
// -model do them (calib.FitSystematic, then calib.FitNoise choosing the
// model on the calibrated configuration), without the files: target 60 s
// on one core (-cpu 1).
func BenchmarkCalibrateTune10Min(b *testing.B) {
	s := fusiontest.New(realScenario(11, 600))
	cfg := naiveConfig(s)
	inputs := recordedInputs(s)
	odo, _, fixes := splitInputs(inputs)
	b.ReportAllocs()
	for b.Loop() {
		sys, err := calib.FitSystematic(cfg, odo, fixes, calib.SystematicOptions{})
		if err != nil {
			b.Fatal(err)
		}
		fit, err := calib.FitNoise(sys.Config, inputs, calib.NoiseFitOptions{ChooseModel: true})
		if err != nil {
			b.Fatal(err)
		}
		b.ReportMetric(float64(fit.Replays), "replays")
	}
}

// recordedInputs runs the simulation to its end.
func recordedInputs(s *fusiontest.Sim) []calib.RecordedInput {
	var inputs []calib.RecordedInput
	for {
		in, ok := s.Next()
		if !ok {
			return inputs
		}
		inputs = append(inputs, calib.RecordedInput{Odometry: in.Odometry, Heading: in.Heading, Fix: in.Fix})
	}
}

// BenchmarkCalibrateAgain10Min is the second reckon calibrate of
// TestRealDataGoal's ten-minute run: calib.FitSystematic on a configuration
// that declares the camera's Gauss-Markov part (fusiontest's
// TrueModelConfig: 95% of the camera's variance, 2.5 s), so that each
// segment's block carries the correlation between the camera's fixes.
func BenchmarkCalibrateAgain10Min(b *testing.B) {
	s := fusiontest.New(realScenario(11, 600))
	cfg := s.TrueModelConfig()
	odo, _, fixes := splitInputs(recordedInputs(s))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := calib.FitSystematic(cfg, odo, fixes, calib.SystematicOptions{}); err != nil {
			b.Fatal(err)
		}
	}
}
