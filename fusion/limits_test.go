package fusion

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
	"unsafe"
)

// TestConfigUpperBounds: a configuration cannot make a new robot allocate
// without bound. trust.nis_window of two billion allocated 160 GB at
// creation (the fixes' and IMU's consistency windows), and window_ns,
// max_held and recovery.count let input grow a robot's memory and its
// snapshot past a journal record. CheckBounds refuses each, naming the
// field, and takes its largest value; New still takes a configuration
// past them (one a journal written before the bounds may hold), except
// the allocation at creation, which is not tried here. max_hold_ahead_ns,
// max_extrapolation_ns and max_odometry_gap_ns were unbounded: with
// int64's largest, GetPoseAt extrapolated a pose 292 years ahead (the
// service probe of session 26).
func TestConfigUpperBounds(t *testing.T) {
	for _, c := range []struct {
		field      string
		set        func(c *Config, v int64)
		most, past int64
	}{
		{"window_ns", func(c *Config, v int64) { c.WindowNs = v }, maxWindowNs, maxWindowNs + 1},
		{"max_held", func(c *Config, v int64) { c.MaxHeld = int(v) }, maxHeldLimit, maxHeldLimit + 1},
		{"recovery.count", func(c *Config, v int64) { c.Recovery.Count = int(v) }, maxRecoveryCount, maxRecoveryCount + 1},
		{"trust.nis_window", func(c *Config, v int64) { c.Trust.NISWindow = int(v) }, maxNISWindow, 2_000_000_000},
		{"sensors[0].latency_ns", func(c *Config, v int64) { c.Sensors[0].LatencyNs = v }, maxWindowNs, math.MaxInt64},
		{"max_hold_ahead_ns", func(c *Config, v int64) { c.MaxHoldAheadNs = v }, maxHoldAheadLimitNs, math.MaxInt64},
		{"max_extrapolation_ns", func(c *Config, v int64) { c.MaxExtrapolationNs = v }, maxExtrapolationLimitNs, math.MaxInt64},
		{"max_odometry_gap_ns", func(c *Config, v int64) { c.MaxOdometryGapNs = v }, maxOdometryGapLimitNs, maxOdometryGapLimitNs + 1},
	} {
		cfg := threeWheels()
		c.set(&cfg, c.past)
		err := cfg.CheckBounds()
		if !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), c.field) || !strings.Contains(err.Error(), "is more than") {
			t.Errorf("%s past its limit: %v", c.field, err)
		}
		if c.field != "trust.nis_window" { // New would allocate its windows
			if _, err := New(cfg); err != nil {
				t.Errorf("New refuses %s past its bound, as an old journal may hold it: %v", c.field, err)
			}
		}
		cfg = threeWheels()
		c.set(&cfg, c.most)
		if err := cfg.CheckBounds(); err != nil {
			t.Errorf("%s at its limit: %v", c.field, err)
		}
	}
	// Positions that a float64 cannot keep to the millimetre (maxFieldM),
	// as samples may not carry them either (a sensor's mount is bound to
	// the robot's size: TestConfigUnitsMistakes).
	for _, c := range []struct {
		field string
		set   func(c *Config, v float64)
	}{
		{"start_pose", func(c *Config, v float64) { c.StartPose.X = v }},
		{"landmarks[0]", func(c *Config, v float64) { c.Landmarks[0].YM = -v }},
	} {
		cfg := threeWheels()
		c.set(&cfg, 1e20)
		if err := cfg.CheckBounds(); !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), c.field) || !strings.Contains(err.Error(), "within 1e+08 m") {
			t.Errorf("%s at 1e20 m: %v", c.field, err)
		}
		if _, err := New(cfg); err != nil {
			t.Errorf("New refuses %s at 1e20 m, as an old journal may hold it: %v", c.field, err)
		}
		cfg = threeWheels()
		c.set(&cfg, maxFieldM)
		if err := cfg.CheckBounds(); err != nil {
			t.Errorf("%s at %g m: %v", c.field, maxFieldM, err)
		}
	}
	// calibration.noise_ratio_std: 1e100 was taken by CheckBounds, and
	// failed most of a depot run's updates as not positive definite.
	for _, v := range []float64{maxNoiseRatioStd + 0.5, 1e100} {
		cfg := threeWheels()
		cfg.Calibration.Scale, cfg.Calibration.NoiseRatioStd = true, v
		if err := cfg.CheckBounds(); !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), "calibration.noise_ratio_std") || !strings.Contains(err.Error(), "is more than") {
			t.Errorf("calibration.noise_ratio_std %g: %v", v, err)
		}
		if _, err := New(cfg); err != nil {
			t.Errorf("New refuses calibration.noise_ratio_std %g, as an old journal may hold it: %v", v, err)
		}
	}
	cfg := threeWheels()
	cfg.Calibration.Scale, cfg.Calibration.NoiseRatioStd = true, maxNoiseRatioStd
	if err := cfg.CheckBounds(); err != nil {
		t.Errorf("calibration.noise_ratio_std at its limit: %v", err)
	}
}

// TestConfigAnglesInDegrees: an angle of a configuration beyond a full
// turn (2 pi rad) is an angle in degrees, the units mistake a person
// makes writing one by hand (direction_rad: 90 for a lateral wheel):
// CheckBounds refuses it naming the field, where it was taken as 90 rad
// (116.6 degrees after wrapping) and every lateral count went a wrong
// way. New still takes it (a journal written before the bound may hold
// one); a full turn is taken.
func TestConfigAnglesInDegrees(t *testing.T) {
	for _, c := range []struct {
		field string
		set   func(c *Config, v float64)
	}{
		{"wheels[2].direction_rad", func(c *Config, v float64) { c.Wheels[2].DirectionRad = v }},
		{"start_pose.heading_rad", func(c *Config, v float64) { c.StartPose.Heading = -v }},
		{"sensors[1].mount.heading_rad", func(c *Config, v float64) { c.Sensors[1].Mount.Heading = v }},
	} {
		cfg := threeWheels()
		c.set(&cfg, 90)
		if err := cfg.CheckBounds(); !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), c.field) || !strings.Contains(err.Error(), "degrees") {
			t.Errorf("%s of 90: %v", c.field, err)
		}
		if _, err := New(cfg); err != nil {
			t.Errorf("New refuses %s of 90, as an old journal may hold it: %v", c.field, err)
		}
		cfg = threeWheels()
		c.set(&cfg, 2*math.Pi)
		if err := cfg.CheckBounds(); err != nil {
			t.Errorf("%s of 2 pi: %v", c.field, err)
		}
	}
}

// TestWindowEntryLimit: odometry stamped 1 us apart (a controller that
// stamps in microseconds but says nanoseconds) keeps at most
// maxWindowEntries in the window, not the second's million; a late fix
// before the shortened window is refused as too old naming its start, and
// one inside it is applied.
func TestWindowEntryLimit(t *testing.T) {
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	tr := []float64{1e-6, 1e-6, 0}
	const n = 3 * maxWindowEntries
	for k := int64(0); k < n; k++ {
		if res := r.AddOdometry(Odometry{StartNs: k * 1000, StampNs: (k + 1) * 1000, TravelM: tr}); res.Verdict != VerdictApplied {
			t.Fatalf("sample %d: %v %v", k, res.Verdict, res.Err)
		}
		if live := len(r.live()); live > maxWindowEntries {
			t.Fatalf("after %d samples the window holds %d entries, more than %d", k+1, live, maxWindowEntries)
		}
	}
	// reserve's room (maxReserve), which the allocator rounds up to whole
	// 8 KiB pages.
	if c := cap(r.ents); c > maxReserve+8192/int(unsafe.Sizeof(entry{})) {
		t.Errorf("the window's slice has room for %d entries for at most %d live", c, maxWindowEntries)
	}
	start := r.WindowStartNs()
	if want := int64(n-maxWindowEntries) * 1000; start < want-1000 || start > want+1000 {
		t.Errorf("window starts at %d ns, want about %d (the newest %d entries)", start, want, maxWindowEntries)
	}
	fix := func(stamp int64) Result {
		return r.AddFix(Fix{SensorID: "position", StampNs: stamp, Kind: FixPosition, XM: 0, YM: 0, Cov: []float64{0.01, 0, 0, 0.01}})
	}
	if res := fix(start - 5000); res.Verdict != VerdictTooOld || !strings.Contains(res.Err.Error(), "the window starts at") {
		t.Errorf("a fix before the shortened window: %v %v", res.Verdict, res.Err)
	}
	if res := fix(start + 5000); res.Verdict != VerdictApplied && res.Verdict != VerdictGated {
		t.Errorf("a fix inside the window: %v %v", res.Verdict, res.Err)
	}
}

// TestConfigUnitsMistakes: lengths written in millimetres and durations
// in seconds or milliseconds, where their fields take metres and
// nanoseconds, are refused by CheckBounds naming the field and the unit
// it takes; New still takes them (a journal written before the bound may
// hold one), and the values of a small robot pass.
func TestConfigUnitsMistakes(t *testing.T) {
	for _, c := range []struct {
		field, unit string
		set         func(c *Config)
	}{
		{"wheels[0]", "metres", func(c *Config) { c.Wheels[0].YM = 120 }},
		{"sensors[1].mount", "metres", func(c *Config) { c.Sensors[1].Mount.X = 150 }},
		{"window_ns", "nanoseconds", func(c *Config) { c.WindowNs = 1 }},
		{"imu_latency_ns", "nanoseconds", func(c *Config) { c.IMULatencyNs = 20 }},
		{"max_odometry_gap_ns", "nanoseconds", func(c *Config) { c.MaxOdometryGapNs = 30 }},
		{"sensors[0].latency_ns", "nanoseconds", func(c *Config) { c.Sensors[0].LatencyNs = 80 }},
	} {
		cfg := threeWheels()
		c.set(&cfg)
		if err := cfg.CheckBounds(); !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), c.field) || !strings.Contains(err.Error(), c.unit) {
			t.Errorf("%s: %v; want a refusal naming it and %s", c.field, err, c.unit)
		}
		if _, err := New(cfg); err != nil {
			t.Errorf("New refuses the %s mistake, as an old journal may hold it: %v", c.field, err)
		}
	}
	// A cart 1.2 m long with a camera on a mast, 80 ms late, a 2 s window.
	cfg := threeWheels()
	cfg.Wheels[0].XM, cfg.Sensors[1].Mount.X, cfg.Sensors[0].LatencyNs, cfg.WindowNs = 0.6, 0.9, 80e6, 2e9
	if err := cfg.CheckBounds(); err != nil {
		t.Errorf("a small robot's values: %v", err)
	}
}

// TestTinyProbabilities: a probability of the configuration at the
// smallest float64 (5e-324) is inside (0, 1), and gate_probability there
// made New panic inside gonum's chi-square quantile ("Initial interval is
// not a bounding interval"): one CreateRobot stopped the whole service.
// Validate refuses each probability below minProbability, naming the
// field, and New takes one at it.
func TestTinyProbabilities(t *testing.T) {
	for _, c := range []struct {
		field string
		set   func(c *Config, p float64)
	}{
		{"gate_probability", func(c *Config, p float64) { c.GateProbability = p }},
		{"recovery.agree_probability", func(c *Config, p float64) { c.Recovery.AgreeProbability = p }},
		{"trust.consistency_probability", func(c *Config, p float64) { c.Trust.ConsistencyProbability = p }},
	} {
		for _, p := range []float64{5e-324, 1e-300} {
			cfg := threeWheels()
			c.set(&cfg, p)
			var err error
			func() {
				defer func() {
					if v := recover(); v != nil {
						err = fmt.Errorf("panic: %v", v)
					}
				}()
				_, err = New(cfg)
			}()
			if !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), c.field) {
				t.Errorf("%s = %g: %v; want a refusal naming it", c.field, p, err)
			}
		}
		cfg := threeWheels()
		c.set(&cfg, minProbability)
		if _, err := New(cfg); err != nil {
			t.Errorf("%s at %g: %v", c.field, minProbability, err)
		}
	}
}

// TestRobustParameterBounds: a new robot's Huber sensor takes a k of at
// least minHuberK (at 5e-324, which Validate takes, each fix's covariance
// was inflated past float64 and the fix refused as a numerical fault: the
// service probe of session 26), and no sensor takes a robust_parameter
// that is not a number, which Validate ignores without a robust loss.
// CheckBounds refuses each naming the field; the default and a k at the
// bound pass.
func TestRobustParameterBounds(t *testing.T) {
	for _, c := range []struct {
		name  string
		robst RobustLoss
		p     float64
		ok    bool
	}{
		{"huber tiny", RobustHuber, 5e-324, false},
		{"huber below the bound", RobustHuber, minHuberK / 2, false},
		{"huber at the bound", RobustHuber, minHuberK, true},
		{"huber default", RobustHuber, 0, true},
		{"none NaN", RobustNone, math.NaN(), false},
		{"student_t infinite", RobustStudentT, math.Inf(1), false},
		{"student_t 3", RobustStudentT, 3, true},
	} {
		cfg := threeWheels()
		cfg.Sensors[0].Robust, cfg.Sensors[0].RobustParameter = c.robst, c.p
		err := cfg.CheckBounds()
		switch {
		case c.ok && err != nil:
			t.Errorf("%s: %v", c.name, err)
		case !c.ok && (!errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), "sensors[0].robust_parameter")):
			t.Errorf("%s: %v, want ErrConfig naming sensors[0].robust_parameter", c.name, err)
		}
	}
}
