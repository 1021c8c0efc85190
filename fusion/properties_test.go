package fusion_test

import (
	"fmt"
	"math"
	"slices"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// allOptions returns cfg with every option of issue "Honest on a real
// robot" on: odometry scale states with random walks, a heading-rate bias
// where there is an absolute heading reference, a camera whose error is
// half correlated over 1.5 s and Student-t weighted, and step noise per
// second.
func allOptions(cfg fusion.Config) fusion.Config {
	cfg.Calibration = fusion.Calibration{Scale: true, ForwardScaleVarPerM: 1e-6, TurnScaleVarPerRad: 1e-6,
		RateBias: true, RateBiasVarRad2PerS3: 1e-8}
	cfg.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
	cam := &cfg.Sensors[0]
	cam.CorrelationTimeS, cam.CorrelatedFraction, cam.Robust = 1.5, 0.5, fusion.RobustStudentT
	cfg.Noise.StepForwardVarM2PerS, cfg.Noise.StepLeftVarM2PerS, cfg.Noise.StepTurnVarRad2PerS = 1e-6, 1e-6, 1e-6
	// The mount's error states too, where the state has room for them
	// (a pose camera's bias block and an IMU offset leave none).
	cam.MountStd = [3]float64{0.01, 0.01, 0.01}
	if cfg.Validate() != nil {
		cam.MountStd = [3]float64{}
	}
	return cfg
}

// surveyed returns cfg with the markers' survey error (3 cm) and a camera
// whose errors are half correlated, Student-t weighted: landmark blocks in
// what room the state leaves (3 blocks beside an IMU offset and the
// camera's bias block; 1 with the odometry scales and the rate bias too).
func surveyed(cfg fusion.Config, calibration bool) fusion.Config {
	cfg.LandmarkPositionStdM = 0.03
	cfg.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
	cam := &cfg.Sensors[0]
	cam.CorrelationTimeS, cam.CorrelatedFraction, cam.Robust = 1.5, 0.5, fusion.RobustStudentT
	if calibration {
		cfg.Calibration = fusion.Calibration{Scale: true, ForwardScaleVarPerM: 1e-6, TurnScaleVarPerRad: 1e-6,
			RateBias: true, RateBiasVarRad2PerS3: 1e-8}
	}
	return cfg
}

// perLandmarkCamera returns cfg with its landmark camera's errors half
// correlated over 1.5 s, each landmark's own (correlated_per_landmark),
// and the markers' survey error (3 cm) unless exact is set.
func perLandmarkCamera(cfg fusion.Config, exact bool) fusion.Config {
	if !exact {
		cfg.LandmarkPositionStdM = 0.03
	}
	cfg.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
	cam := &cfg.Sensors[0]
	cam.CorrelationTimeS, cam.CorrelatedFraction, cam.CorrelatedPerLandmark = 1.5, 0.5, true
	return cfg
}

// runOdometry feeds only the odometry of a scenario and returns the robot.
func runOdometry(t *testing.T, sc fusiontest.Scenario, options bool) *fusion.Robot {
	t.Helper()
	s := fusiontest.New(sc)
	cfg := s.Config()
	if options {
		cfg = allOptions(cfg)
	}
	r, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	for {
		in, ok := s.Next()
		if !ok {
			return r
		}
		if in.Odometry == nil {
			continue
		}
		if res := r.AddOdometry(*in.Odometry); res.Verdict != fusion.VerdictApplied {
			t.Fatalf("odometry refused: %v", res.Err)
		}
	}
}

// TestRateInvariance: the same noise-free greenhouse route (constant-twist
// segments that start on both sample grids) fed at 50 Hz and at 500 Hz ends
// within 1e-9 m in position and 0.1% in covariance (DEVELOPERS.md, "Design: Process
// noise"; the noise model adds over sub-intervals), also with the scale,
// rate-bias and bias states and their noise on.
func TestRateInvariance(t *testing.T) {
	for _, options := range []bool{false, true} {
		for _, layout := range []fusiontest.Layout{fusiontest.FreeWheelTurn, fusiontest.DriveWheelTurn, fusiontest.GyroTurn} {
			name := layout.String()
			if options {
				name += "/all-options"
			}
			t.Run(name, func(t *testing.T) { rateInvariance(t, layout, options) })
		}
	}
}

func rateInvariance(t *testing.T, layout fusiontest.Layout, options bool) {
	base := fusiontest.Scenario{Layout: layout, NoiseFree: true, DurationS: 40, IMU: layout != fusiontest.GyroTurn}
	slow, fast := base, base
	slow.OdometryHz, fast.OdometryHz = 50, 500
	a := runOdometry(t, slow, options).Pose()
	b := runOdometry(t, fast, options).Pose()
	if d := math.Hypot(a.Pose.X-b.Pose.X, a.Pose.Y-b.Pose.Y); d > 1e-9 {
		t.Errorf("end positions differ by %g m: %+v vs %+v", d, a.Pose, b.Pose)
	}
	if d := math.Abs(estimator.Wrap(a.Pose.Heading - b.Pose.Heading)); d > 1e-9 {
		t.Errorf("end headings differ by %g rad", d)
	}
	for i := range a.Cov {
		if i%4 != 0 {
			continue // compare variances; covariances can pass through zero
		}
		if rel := math.Abs(a.Cov[i]-b.Cov[i]) / b.Cov[i]; rel > 1e-3 {
			t.Errorf("variance %d: %.6g at 50 Hz vs %.6g at 500 Hz (%.3f%%)", i/4, a.Cov[i], b.Cov[i], 100*rel)
		}
	}
	if a.Pose.X == 0 && a.Pose.Y == 0 {
		t.Errorf("the robot did not move")
	}
}

// TestStandingStill: a robot standing still, sampled at 1 kHz for 10 s,
// gains no position uncertainty from its encoders; its heading variance grows
// by exactly the heading random walk over the elapsed time, however fast it
// is sampled.
func TestStandingStill(t *testing.T) {
	for _, hz := range []int64{10, 1000} {
		cfg := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn}.Config()
		cfg.StartPose = estimator.Pose{}
		r, err := fusion.New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		start := r.Pose()
		period := int64(1e9) / hz
		for k := int64(0); k < 10*hz; k++ {
			res := r.AddOdometry(fusion.Odometry{StartNs: k * period, StampNs: (k + 1) * period, TravelM: []float64{0, 0, 0}})
			if res.Verdict != fusion.VerdictApplied {
				t.Fatal(res.Err)
			}
		}
		end := r.Pose()
		for _, i := range []int{0, 1, 4} {
			if end.Cov[i] != start.Cov[i] {
				t.Errorf("%d Hz: position covariance entry %d went from %g to %g", hz, i, start.Cov[i], end.Cov[i])
			}
		}
		want := start.Cov[8] + cfg.Noise.HeadingVarRad2PerS*10
		if math.Abs(end.Cov[8]-want) > 1e-15 {
			t.Errorf("%d Hz: heading variance %g, want %g", hz, end.Cov[8], want)
		}
	}
}

// collect returns a scenario's inputs in arrival order.
func collect(sc fusiontest.Scenario) (*fusiontest.Sim, []fusiontest.Input) {
	s := fusiontest.New(sc)
	var ins []fusiontest.Input
	for {
		in, ok := s.Next()
		if !ok {
			return s, ins
		}
		ins = append(ins, in)
	}
}

// stampOrder returns the inputs sorted by stamp, odometry first at one
// stamp (a fix at an odometry stamp is then inserted, not held, in both
// orders).
func stampOrder(arrival []fusiontest.Input) []fusiontest.Input {
	stamped := slices.Clone(arrival)
	slices.SortStableFunc(stamped, func(a, b fusiontest.Input) int {
		sa, sb := a.StampNs(), b.StampNs()
		switch {
		case sa < sb:
			return -1
		case sa > sb:
			return 1
		}
		if (a.Odometry != nil) != (b.Odometry != nil) && a.Odometry != nil {
			return -1
		}
		return 0
	})
	return stamped
}

// TestLateEqualsStampOrder: camera fixes delivered 150 ms late, and IMU
// samples arriving out of order with odometry, give the same estimate as the
// same samples delivered in stamp order (DEVELOPERS.md, "Design: Time ordering and late measurements"), to 1e-9.
//
// With every option on (allOptions) the same holds: bias blocks decay
// exactly under the interval splitting, and the scales are constant over
// an interval.
func TestLateEqualsStampOrder(t *testing.T) {
	for _, c := range []struct {
		sc          fusiontest.Scenario
		options     bool
		survey      bool
		perLandmark int // 1: with the survey error, 2: an exact map
	}{
		{fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 21, IMU: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, OutlierFraction: 0.05, DurationS: 30}, false, false, 0},
		{fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 22, IMU: true, Markers: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30}, false, false, 0},
		{fusiontest.Scenario{Layout: fusiontest.GyroTurn, Seed: 23, Counts: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30}, false, false, 0},
		{fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 24, IMU: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, OutlierFraction: 0.05, DurationS: 30}, true, false, 0},
		{fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 25, IMU: true, Markers: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30}, true, false, 0},
		{fusiontest.Scenario{Layout: fusiontest.GyroTurn, Seed: 26, Counts: true, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30}, true, false, 0},
		// Landmark blocks: three, and one that the markers take in turns.
		{fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 27, IMU: true, MarkerCount: 16, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30,
			Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}, false, true, 0},
		{fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 28, IMU: true, MarkerCount: 16, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30,
			Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}, true, true, 0},
		// Per-landmark correlated camera errors (markercorr.go): 16
		// markers taken in turns, so that a marker comes back after its
		// last fix left the 1 s window, with landmark blocks, and without.
		{sc: fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 29, IMU: true, MarkerCount: 16, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30,
			Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}, perLandmark: 1},
		{sc: fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 30, IMU: true, MarkerCount: 16, LatencyMinS: 0.15, LatencyMaxS: 0.15, DurationS: 30}, perLandmark: 2},
	} {
		sc := c.sc
		name := sc.Layout.String()
		if c.options {
			name += "/all-options"
		}
		if c.survey {
			name += "/landmark-blocks"
		}
		if c.perLandmark > 0 {
			name += fmt.Sprintf("/per-landmark-%d", c.perLandmark)
		}
		t.Run(name, func(t *testing.T) {
			lateEqualsStampOrder(t, sc, func(cfg fusion.Config) fusion.Config {
				switch {
				case c.perLandmark > 0:
					cfg = perLandmarkCamera(cfg, c.perLandmark == 2)
				case c.survey:
					cfg = surveyed(cfg, c.options)
				case c.options:
					cfg = allOptions(cfg)
				}
				return cfg
			})
		})
	}
}

// lateEqualsStampOrder feeds scenario sc's samples to a robot of its
// configuration, edited by edit, in arrival order (fixes 150 ms late, IMU
// samples out of order with odometry) and to another in stamp order, and
// checks that both end with the same estimate, and agree at every stamp
// of the window, to 1e-9 (TestLateEqualsStampOrder).
func lateEqualsStampOrder(t *testing.T, sc fusiontest.Scenario, edit func(fusion.Config) fusion.Config) {
	t.Helper()
	s, arrival := collect(sc)
	// Pose fixes name their marker, a new one every second, so that
	// recovery counts markers (recovery.distinct_markers 2) in both
	// orders.
	nameMarkers(arrival, 1e9)
	stamped := stampOrder(arrival)
	cfg := edit(s.Config())
	late, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	inOrder, _ := fusion.New(cfg)
	var lateFixes int
	for i := range arrival {
		res := fusiontest.Feed(late, &arrival[i])
		if arrival[i].Fix != nil && res.Verdict != fusion.VerdictHeld {
			lateFixes++
		}
		fusiontest.Feed(inOrder, &stamped[i])
	}
	if lateFixes < 100 {
		t.Fatalf("only %d fixes were inserted late", lateFixes)
	}
	a, b := late.Pose(), inOrder.Pose()
	if d := math.Hypot(a.Pose.X-b.Pose.X, a.Pose.Y-b.Pose.Y) + math.Abs(estimator.Wrap(a.Pose.Heading-b.Pose.Heading)); d > 1e-9 {
		t.Errorf("late %+v, in stamp order %+v (difference %g)", a.Pose, b.Pose, d)
	}
	for i := range a.Cov {
		if math.Abs(a.Cov[i]-b.Cov[i]) > 1e-9*math.Max(1e-6, math.Abs(b.Cov[i])) {
			t.Errorf("covariance %d: late %g, in stamp order %g", i, a.Cov[i], b.Cov[i])
		}
	}
	// Every stamp inside the window agrees too.
	for ts := late.WindowStartNs(); ts <= late.NewestNs(); ts += 37e6 {
		pa, ea := late.PoseAt(ts)
		pb, eb := inOrder.PoseAt(ts)
		if ea != nil || eb != nil {
			continue // the two window starts may differ by one entry
		}
		if d := math.Hypot(pa.Pose.X-pb.Pose.X, pa.Pose.Y-pb.Pose.Y); d > 1e-9 {
			t.Errorf("PoseAt(%d) differs by %g m", ts, d)
		}
	}
}
