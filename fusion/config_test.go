package fusion

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"
)

func TestConfigValidate(t *testing.T) {
	good := func() Config {
		return Config{Wheels: []Wheel{{XM: 0, YM: 0.12}, {XM: 0, YM: -0.12}, {XM: -0.08, DirectionRad: math.Pi / 2}},
			Sensors: []Sensor{
				{ID: "camera", Kind: FixLandmark, Cov: []float64{4e-4, 0, 0, 1e-4}, CorrelationTimeS: 1.5, CorrelatedFraction: 0.5, Robust: RobustHuber},
				{ID: "gnss", Kind: FixPosition, Robust: RobustStudentT},
			},
			Calibration: Calibration{Scale: true, RateBias: true}}
	}
	cases := []struct {
		name  string
		edit  func(*Config)
		field string
	}{
		{"parallel wheels only", func(c *Config) { c.Wheels = c.Wheels[:2] }, "wheels"},
		{"two wheels no slip row", func(c *Config) { c.Wheels = c.Wheels[:2]; c.Wheels = append(c.Wheels, Wheel{XM: 0.3}) }, "wheels"},
		{"NaN wheel", func(c *Config) { c.Wheels[1].YM = math.NaN() }, "wheels[1]"},
		{"negative counts", func(c *Config) { c.Wheels[2].CountsPerM = -1 }, "wheels[2].counts_per_m"},
		{"wheel direction of 1e300 rad", func(c *Config) { c.Wheels[2].DirectionRad = 1e300 }, "wheels[2]"},
		{"start heading of 1e9 rad", func(c *Config) { c.StartPose.Heading = 1e9 }, "start_pose"},
		{"mount heading of -1e300 rad", func(c *Config) { c.Sensors[0].Mount.Heading = -1e300 }, "sensors[0].mount"},
		{"counter bits", func(c *Config) { c.Wheels[0].CounterBits = 4 }, "wheels[0].counter_bits"},
		{"negative noise", func(c *Config) { c.Noise.WheelVarM2PerM = -1 }, "noise.wheel_var_m2_per_m"},
		{"gate", func(c *Config) { c.GateProbability = 1.5 }, "gate_probability"},
		{"window", func(c *Config) { c.WindowNs = -5 }, "window_ns"},
		{"recovery count", func(c *Config) { c.Recovery.Count = 1 }, "recovery.count"},
		{"distinct markers negative", func(c *Config) { c.Recovery.DistinctMarkers = -1 }, "recovery.distinct_markers"},
		{"distinct markers too many", func(c *Config) { c.Recovery.DistinctMarkers = 9 }, "recovery.distinct_markers"},
		{"initial cov", func(c *Config) { c.StartCov = []float64{1, 2, 0, 2, 1, 0, 0, 0, 1} }, "start_covariance"},
		{"initial cov size", func(c *Config) { c.StartCov = []float64{1} }, "start_covariance"},
		{"landmark twice", func(c *Config) { c.Landmarks = []Landmark{{ID: "a"}, {ID: "a"}} }, "landmarks[1].id"},
		{"imu mode", func(c *Config) { c.IMU = 9 }, "imu_mode"},
		{"negative IMU latency", func(c *Config) { c.IMULatencyNs = -1 }, "imu_latency_ns"},
		{"IMU latency over a second", func(c *Config) { c.IMULatencyNs = 1e9 + 1 }, "imu_latency_ns"},
		{"IMU latency in rotation mode", func(c *Config) { c.IMU = IMURotation; c.IMULatencyNs = 5e6 }, "imu_latency_ns"},
		{"rotation without wheels", func(c *Config) { c.Wheels = nil; c.IMU = IMURotation }, "imu_mode"},
		{"sensor without id", func(c *Config) { c.Sensors[0].ID = "" }, "sensors[0].id"},
		{"sensor named imu", func(c *Config) { c.Sensors[1].ID = "imu" }, "sensors[1].id"},
		{"sensor twice", func(c *Config) { c.Sensors[1].ID = "camera" }, "sensors[1].id"},
		{"sensor kind", func(c *Config) { c.Sensors[0].Kind = 9 }, "sensors[0].kind"},
		{"sensor cov size", func(c *Config) { c.Sensors[0].Cov = []float64{1} }, "sensors[0].covariance"},
		{"sensor latency", func(c *Config) { c.Sensors[0].LatencyNs = -1 }, "sensors[0].latency_ns"},
		{"correlated fraction", func(c *Config) { c.Sensors[0].CorrelatedFraction = 1 }, "sensors[0].correlated_fraction"},
		{"correlated without time", func(c *Config) { c.Sensors[0].CorrelationTimeS = 0 }, "sensors[0].correlation_time_s"},
		{"correlated without cov", func(c *Config) { c.Sensors[1].CorrelatedFraction, c.Sensors[1].CorrelationTimeS = 0.5, 2 }, "sensors[1].covariance"},
		{"per-landmark correlation of a position sensor", func(c *Config) { c.Sensors[1].CorrelatedPerLandmark = true }, "sensors[1].correlated_per_landmark"},
		{"robust loss", func(c *Config) { c.Sensors[1].Robust = 7 }, "sensors[1].robust"},
		{"robust parameter", func(c *Config) { c.Sensors[1].RobustParameter = -1 }, "sensors[1].robust_parameter"},
		{"student-t with one degree of freedom", func(c *Config) {
			c.Sensors[1].Robust, c.Sensors[1].RobustParameter = RobustStudentT, 1
		}, "sensors[1].robust_parameter"},
		{"too many sensors", func(c *Config) {
			for i := 0; i < MaxSensors; i++ {
				c.Sensors = append(c.Sensors, Sensor{ID: fmt.Sprint("s", i), Kind: FixHeading})
			}
		}, "sensors"},
		{"state too large", func(c *Config) {
			for i := 0; i < 3; i++ {
				c.Sensors = append(c.Sensors, Sensor{ID: fmt.Sprint("p", i), Kind: FixPose, Cov: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}, CorrelationTimeS: 1, CorrelatedFraction: 0.5})
			}
		}, "sensors"},
		{"scale std", func(c *Config) { c.Calibration.ScaleStd = -0.1 }, "calibration.scale_std"},
		{"noise ratio std", func(c *Config) { c.Calibration.NoiseRatioStd = math.Inf(1) }, "calibration.noise_ratio_std"},
		{"negative noise ratio std", func(c *Config) { c.Calibration.NoiseRatioStd = -0.5 }, "calibration.noise_ratio_std"},
		// Its square past float64's range: taken before, and every update
		// that took a pull out failed.
		{"noise ratio std squared past float64", func(c *Config) { c.Calibration.NoiseRatioStd = 1e155 }, "calibration.noise_ratio_std"},
		{"rate bias without heading reference", func(c *Config) { c.Sensors = c.Sensors[1:2]; c.Calibration.RateBias = true }, "calibration.rate_bias"},
		{"step noise per second", func(c *Config) { c.Noise.StepTurnVarRad2PerS = -1 }, "noise.step_turn_var_rad2_per_s"},
		{"IMU offset walk per radian", func(c *Config) { c.Noise.IMUOffsetVarRad2PerRad = math.Inf(1) }, "noise.imu_offset_var_rad2_per_rad"},
	}
	if err := good().Validate(); err != nil {
		t.Fatalf("good config: %v", err)
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			cfg := good()
			c.edit(&cfg)
			err := cfg.Validate()
			if !errors.Is(err, ErrConfig) || !strings.Contains(err.Error(), c.field+":") {
				t.Errorf("error %v, want one naming %q", err, c.field)
			}
			if _, nerr := New(cfg); nerr == nil {
				t.Errorf("New accepted the config")
			}
		})
	}
	// One parallel and one lateral wheel need the IMU's turn row.
	cfg := Config{Wheels: []Wheel{{YM: 0.1}, {XM: -0.08, DirectionRad: math.Pi / 2}}}
	if err := cfg.Validate(); err == nil {
		t.Errorf("two wheels without IMU accepted")
	}
	cfg.IMU = IMURotation
	if err := cfg.Validate(); err != nil {
		t.Errorf("two wheels with IMU rotation: %v", err)
	}
}

// TestCountDelta: wrap-around of a counter of a given width (two's
// complement arithmetic, common practice).
func TestCountDelta(t *testing.T) {
	cases := []struct {
		cur, prev int64
		bits      int
		want      int64
	}{
		{10, 5, 16, 5},
		{5, 10, 16, -5},
		{3, 65533, 16, 6},
		{65533, 3, 16, -6},
		{0, 255, 8, 1},
		{-3, 4, 0, -7},
		{-2, 1, 64, -3},
	}
	for _, c := range cases {
		if got := countDelta(c.cur, c.prev, c.bits); got != c.want {
			t.Errorf("countDelta(%d, %d, %d) = %d, want %d", c.cur, c.prev, c.bits, got, c.want)
		}
	}
}
