package fusion

import (
	"errors"
	"fmt"
	"math"

	"gonum.org/v1/gonum/mat"

	"reckon.example/estimator"
)

// Wheel is an encoder wheel's mounting on the robot.
type Wheel struct {
	// Name labels the wheel in messages.
	Name string
	// XM and YM are the contact point's body position in metres.
	XM, YM float64
	// DirectionRad is the rolling direction in the body frame (0 rolls
	// forward, pi/2 rolls left).
	DirectionRad float64
	// CountsPerM converts cumulative counts to metres; needed only when
	// odometry samples carry counts.
	CountsPerM float64
	// CounterBits is the encoder counter's width for wrap-around (0 means
	// the counter does not wrap within int64).
	CounterBits int
}

// Noise holds the noise model. Every variance is a rate per distance, per
// angle or per second, so that it adds over sub-intervals (DEVELOPERS.md,
// "Design: Process noise"). Zero fields take the defaults of DefaultNoise.
type Noise struct {
	// WheelVarM2PerM: variance of a wheel's reading per metre it rolls.
	WheelVarM2PerM float64
	// LateralSlipVarM2PerM: variance of sideways slip per metre driven, for
	// the no-side-slip row.
	LateralSlipVarM2PerM float64
	// TurnVarRad2PerRad: extra heading variance per radian turned (wheel
	// scrub in turns).
	TurnVarRad2PerRad float64
	// HeadingVarRad2PerS: heading random walk per second: rotation the
	// wheels do not see. Not in imu_mode rotation, where the IMU sees every
	// rotation and its zero's drift, IMUOffsetVarRad2PerS, takes its place
	// (HeadingDriftVarPerS).
	HeadingVarRad2PerS float64
	// StepForwardVarM2PerM, StepLeftVarM2PerM, StepTurnVarRad2PerRad: noise
	// of body steps that the robot computed itself, per metre and per radian.
	StepForwardVarM2PerM  float64
	StepLeftVarM2PerM     float64
	StepTurnVarRad2PerRad float64
	// StepForwardVarM2PerS, StepLeftVarM2PerS, StepTurnVarRad2PerS: noise
	// of body steps per second elapsed, beside the terms above (odometry
	// from commanded velocities errs with time, moving or not). Zero (the
	// default) leaves the term out.
	StepForwardVarM2PerS float64
	StepLeftVarM2PerS    float64
	StepTurnVarRad2PerS  float64
	// IMUHeadingVarRad2: variance of one absolute IMU heading reading, the
	// IMU's own; the update adds the latest counts' quantisation
	// (Config.countsTurnVar).
	IMUHeadingVarRad2 float64
	// IMUTurnVarRad2PerRad: variance of an IMU turn row per radian turned.
	IMUTurnVarRad2PerRad float64
	// IMUOffsetVarRad2PerS: random walk of the IMU's heading zero per second:
	// the offset state's in imu_mode absolute, the heading's in rotation
	// (the zero's drift enters every turn the IMU reports).
	IMUOffsetVarRad2PerS float64
	// IMUOffsetVarRad2PerRad: random walk of the IMU's heading zero per
	// radian the robot turns, in imu_mode absolute: a gyro whose scale
	// is off reads every turn a fraction wrong. Zero (the default) leaves
	// the term out.
	IMUOffsetVarRad2PerRad float64
}

// HeadingDriftVarPerS returns the heading's random walk per second that
// the prediction adds (rad^2/s): in imu_mode rotation the IMU's zero
// drifting (IMUOffsetVarRad2PerS), since the turn comes from the IMU,
// which sees every rotation of the robot; otherwise the rotation the wheels
// do not see (HeadingVarRad2PerS). DEVELOPERS.md, "Design: Process noise".
func (c *Config) HeadingDriftVarPerS() float64 {
	if c.IMU == IMURotation {
		return c.Noise.IMUOffsetVarRad2PerS
	}
	return c.Noise.HeadingVarRad2PerS
}

// stepNoise writes the covariance of a body step the robot computed itself
// over dtS seconds.
func (n *Noise) stepNoise(dst *[9]float64, s estimator.Step, dtS float64) {
	estimator.StepNoise(dst, s, dtS, &estimator.StepRates{
		ForwardVarM2PerM: n.StepForwardVarM2PerM, LeftVarM2PerM: n.StepLeftVarM2PerM, TurnVarRad2PerRad: n.StepTurnVarRad2PerRad,
		ForwardVarM2PerS: n.StepForwardVarM2PerS, LeftVarM2PerS: n.StepLeftVarM2PerS, TurnVarRad2PerS: n.StepTurnVarRad2PerS,
	})
}

// DefaultNoise returns the noise model used where a Noise field is zero. It
// suits small robots with free-rolling encoder wheels and a MEMS gyro
// (common practice: about half a percent of travel, a few milliradians of
// IMU heading noise). The IMU offset's walk, 1e-6 rad^2/s, covers a gyro
// whose zero drifts 3e-4 rad/s (about a degree a minute, an inexpensive
// MEMS gyro's; from memory) under fixes a few times a second: the honesty
// case gyro-bias, where 1e-7 left the filter overconfident (DEVELOPERS.md,
// "Design: Process noise").
func DefaultNoise() Noise {
	return Noise{
		WheelVarM2PerM:        2.5e-5,
		LateralSlipVarM2PerM:  1e-4,
		TurnVarRad2PerRad:     1e-5,
		HeadingVarRad2PerS:    1e-7,
		StepForwardVarM2PerM:  1e-4,
		StepLeftVarM2PerM:     1e-4,
		StepTurnVarRad2PerRad: 1e-4,
		IMUHeadingVarRad2:     2.5e-5,
		IMUTurnVarRad2PerRad:  1e-6,
		IMUOffsetVarRad2PerS:  1e-6,
	}
}

// Recovery is the move-recovery policy: Count consecutive refused pose
// fixes that agree with one another, from DistinctMarkers markers when
// they name theirs, re-initialise the pose from the last of them.
type Recovery struct {
	// Enabled turns move recovery on.
	Enabled bool
	// Count is how many consecutive refused pose fixes it takes (default 3).
	Count int
	// AgreeProbability is the chi-square probability within which the
	// fixes must agree with one another (default 0.99).
	AgreeProbability float64
	// DistinctMarkers is how many different markers the agreeing refused
	// fixes must come from (default 2, at most maxDistinctMarkers): pose
	// fixes by Fix.Marker, landmark fixes by their landmark (at least two
	// of those anyway, for the heading). A run of pose fixes that name no
	// marker recovers as before; 1 recovers from one marker's fixes
	// (DEVELOPERS.md, "Design: Gating and recovery").
	DistinctMarkers int
}

// TrustLimits say when the estimate must not be trusted. Zero fields take
// the defaults in parentheses.
type TrustLimits struct {
	// MaxPosition95M: largest 95% position radius (0.5 m).
	MaxPosition95M float64
	// MaxHeadingStdRad: largest heading standard deviation (0.1 rad).
	MaxHeadingStdRad float64
	// NISWindow: how many recent applied fixes the consistency check sums
	// (20); the IMU headings' window holds five times as many.
	NISWindow int
	// ConsistencyProbability: the chi-square probability that the windowed
	// NIS sum must stay below (0.999; for the IMU window, whose headings come
	// ten times as often, a tenth of the rest: 0.9999). Once above, the
	// inconsistent flag stands until the sum is back to its median.
	ConsistencyProbability float64
	// RefusedInARow: consecutive refused fixes that raise distrust (5).
	RefusedInARow int
}

// Landmark is a mapped marker at a field position.
type Landmark struct {
	ID     string
	XM, YM float64
	// PositionStdM is the standard deviation of the surveyed position's
	// error in each axis, metres (0: Config.LandmarkPositionStdM).
	PositionStdM float64
}

// Config is one robot's configuration. The zero value of every field except
// Wheels means its documented default; Validate names the field at fault.
type Config struct {
	// Wheels is the encoder wheel layout, in the order of odometry samples.
	// A robot without wheels accepts only body-step odometry.
	Wheels []Wheel
	// NoSideSlip adds the row "leftward travel is zero" (differential drive).
	NoSideSlip bool
	// IMU is how the IMU's heading is used.
	IMU   IMUMode
	Noise Noise
	// GateProbability is the chi-square probability of the fix gate (0.99).
	GateProbability float64
	// GateIMU gates IMU headings too. Off by default: the wheels, not the
	// IMU, are what slips, and an ungated IMU pulls a slipped heading back
	// (the disagreement still shows in the IMU's NIS statistics).
	GateIMU bool
	// WindowNs is the history window for late samples (1 s).
	WindowNs int64
	// MaxHeld bounds the samples held waiting for odometry (256).
	MaxHeld int
	// MaxHoldAheadNs bounds how far past the newest odometry a held sample
	// may be stamped (1 s).
	MaxHoldAheadNs int64
	// MaxExtrapolationNs bounds PoseAt past the newest odometry (250 ms).
	MaxExtrapolationNs int64
	// MaxOdometryGapNs bounds how far past the newest odometry the next
	// odometry may be stamped (1 day): a stamp that jumps further is a
	// corrupt stamp or message, refused with ErrTooFarAhead; taken, it
	// would put the robot's clock out of reach of every sample after it.
	MaxOdometryGapNs int64
	// IMULatencyNs is how much later than the reading the IMU's absolute
	// headings are stamped (imu_mode absolute; 0 by default, at most
	// maxIMULatencyNs): a heading stamped stamp_ns was read at stamp_ns -
	// IMULatencyNs, where it is applied. An IMU read over a serial link
	// and stamped on arrival lags its reading by its transfer and
	// filtering; uncorrected, its heading lags every turn.
	IMULatencyNs int64
	// MaxSpeedMPerS and MaxTurnRateRadPerS refuse absurd odometry (5 m/s, 20 rad/s).
	MaxSpeedMPerS      float64
	MaxTurnRateRadPerS float64
	Recovery           Recovery
	Trust              TrustLimits
	// StartPose and StartCov (3x3 row-major, m^2 and rad^2) seed the
	// estimate (default covariance diag(0.0025, 0.0025, 0.0012)).
	StartPose estimator.Pose
	StartCov  []float64
	Landmarks []Landmark
	// LandmarkPositionStdM is the survey error of the landmarks' positions
	// (standard deviation in each axis, metres) for those without their
	// own; 0 takes the map as exact. Above 0, landmark fixes carry it in
	// landmark blocks of the state (DEVELOPERS.md, "Design: Landmark survey
	// error").
	LandmarkPositionStdM float64
	// Sensors are the sources of fixes, at most MaxSensors; a fix must
	// name one (DEVELOPERS.md, "Design: Sensors").
	Sensors []Sensor
	// Calibration adds odometry calibration states.
	Calibration Calibration
}

// The largest values CheckBounds takes (see there).
const (
	maxWindowNs      = 5e9
	maxHeldLimit     = 1024
	maxRecoveryCount = 100
	// maxDistinctMarkers bounds recovery.distinct_markers (checked by
	// Validate): each marker beyond the first keeps one more candidate.
	maxDistinctMarkers = 8
	maxNISWindow       = 1000
	// maxHoldAheadLimitNs, maxExtrapolationLimitNs and
	// maxOdometryGapLimitNs bound max_hold_ahead_ns, max_extrapolation_ns
	// and max_odometry_gap_ns (CheckBounds): unbounded, a robot created
	// with int64's largest extrapolated its pose 292 years ahead
	// (GetPoseAt answered x = 4.6e8 m).
	maxHoldAheadLimitNs     = 60e9
	maxExtrapolationLimitNs = 10e9
	maxOdometryGapLimitNs   = 30 * 86400e9
	// minHuberK bounds a Huber sensor's robust_parameter from below
	// (CheckBounds): at 5e-324 each fix's covariance was inflated past
	// float64 and the fix refused as a numerical fault (session 26's
	// probe).
	minHuberK = 0.01
	// maxIMULatencyNs bounds imu_latency_ns (checked by Validate): an IMU
	// that lags its readings by more than a second is no heading source.
	maxIMULatencyNs = 1e9
	// minProbability bounds gate_probability,
	// recovery.agree_probability and trust.consistency_probability from
	// below (checked by Validate): each becomes a threshold through
	// gonum's chi-square quantile, which panics below about 1e-45 for
	// some degrees of freedom (measured for 1 to 3100: 1e-250 and less at
	// 1, 1e-200 at 2, 1e-100 at 26, 5e-324 at every one), and a
	// probability that small passes nothing anyway. A journal whose robot
	// was made with one below it is refused at restore: for the gate and
	// the agreement one below about 1e-45 (New panicked), and one between
	// that and 1e-30, which New took at 1 to 3 degrees of freedom (a
	// probability no one configures; the review of session 26); for the
	// consistency probability any (it panicked once a sensor's consistency
	// window filled, or would have at the lowest).
	minProbability = 1e-30
)

// ErrConfig marks every configuration error.
var ErrConfig = errors.New("invalid configuration")

func cfgErr(field, format string, args ...any) error {
	return FieldErrorf(ErrConfig, field, format, args...)
}

// withDefaults returns a copy of c with zero fields set to their defaults.
func (c Config) withDefaults() Config {
	def := func(v *float64, d float64) {
		if *v == 0 {
			*v = d
		}
	}
	n, d := &c.Noise, DefaultNoise()
	def(&n.WheelVarM2PerM, d.WheelVarM2PerM)
	def(&n.LateralSlipVarM2PerM, d.LateralSlipVarM2PerM)
	def(&n.TurnVarRad2PerRad, d.TurnVarRad2PerRad)
	def(&n.HeadingVarRad2PerS, d.HeadingVarRad2PerS)
	def(&n.StepForwardVarM2PerM, d.StepForwardVarM2PerM)
	def(&n.StepLeftVarM2PerM, d.StepLeftVarM2PerM)
	def(&n.StepTurnVarRad2PerRad, d.StepTurnVarRad2PerRad)
	def(&n.IMUHeadingVarRad2, d.IMUHeadingVarRad2)
	def(&n.IMUTurnVarRad2PerRad, d.IMUTurnVarRad2PerRad)
	def(&n.IMUOffsetVarRad2PerS, d.IMUOffsetVarRad2PerS)
	def(&c.GateProbability, 0.99)
	if c.WindowNs == 0 {
		c.WindowNs = 1e9
	}
	if c.MaxHeld == 0 {
		c.MaxHeld = 256
	}
	if c.MaxHoldAheadNs == 0 {
		c.MaxHoldAheadNs = 1e9
	}
	if c.MaxExtrapolationNs == 0 {
		c.MaxExtrapolationNs = 250e6
	}
	if c.MaxOdometryGapNs == 0 {
		c.MaxOdometryGapNs = 86400e9
	}
	def(&c.MaxSpeedMPerS, 5)
	def(&c.MaxTurnRateRadPerS, 20)
	if c.Recovery.Count == 0 {
		c.Recovery.Count = 3
	}
	def(&c.Recovery.AgreeProbability, 0.99)
	if c.Recovery.DistinctMarkers == 0 {
		c.Recovery.DistinctMarkers = 2
	}
	def(&c.Trust.MaxPosition95M, 0.5)
	def(&c.Trust.MaxHeadingStdRad, 0.1)
	if c.Trust.NISWindow == 0 {
		c.Trust.NISWindow = 20
	}
	def(&c.Trust.ConsistencyProbability, 0.999)
	if c.Trust.RefusedInARow == 0 {
		c.Trust.RefusedInARow = 5
	}
	if c.StartCov == nil {
		c.StartCov = []float64{0.0025, 0, 0, 0, 0.0025, 0, 0, 0, 0.0012}
	}
	c.Sensors = append([]Sensor(nil), c.Sensors...)
	for i := range c.Sensors {
		c.Sensors[i] = c.Sensors[i].withDefaults()
	}
	def(&c.Calibration.ScaleStd, 0.1)
	def(&c.Calibration.RateBiasStdRadPerS, 0.01)
	def(&c.Calibration.NoiseRatioStd, 0.5)
	return c
}

// Validate checks the configuration (after defaults) and returns an error
// wrapping ErrConfig that names the offending field.
func (c Config) Validate() error {
	c = c.withDefaults()
	for _, check := range []func() error{c.checkWheels, c.checkNoise, c.checkLimits, c.checkStart, c.checkLandmarks, c.checkLayout, c.checkSensors, c.checkCalibration, c.checkState} {
		if err := check(); err != nil {
			return err
		}
	}
	return nil
}

// checkWheels checks each wheel's mounting and counter.
func (c *Config) checkWheels() error {
	for i, w := range c.Wheels {
		f := fmt.Sprintf("wheels[%d]", i)
		if !finiteAll(w.XM, w.YM) || !anglesOK(w.DirectionRad) {
			return cfgErr(f, "position must be finite, direction_rad within %g rad of 0", maxAngleRad)
		}
		if w.CountsPerM < 0 || !finiteAll(w.CountsPerM) {
			return cfgErr(f+".counts_per_m", "%v must be positive (or 0 when samples carry metres)", w.CountsPerM)
		}
		if w.CounterBits < 0 || w.CounterBits > 64 || (w.CounterBits > 0 && w.CounterBits < 8) {
			return cfgErr(f+".counter_bits", "%d must be 0 (no wrap) or 8 to 64", w.CounterBits)
		}
	}
	return nil
}

// checkNoise checks that every noise rate is a positive finite variance.
func (c *Config) checkNoise() error {
	noise := []struct {
		name string
		v    float64
	}{
		{"noise.wheel_var_m2_per_m", c.Noise.WheelVarM2PerM},
		{"noise.lateral_slip_var_m2_per_m", c.Noise.LateralSlipVarM2PerM},
		{"noise.turn_var_rad2_per_rad", c.Noise.TurnVarRad2PerRad},
		{"noise.heading_var_rad2_per_s", c.Noise.HeadingVarRad2PerS},
		{"noise.step_forward_var_m2_per_m", c.Noise.StepForwardVarM2PerM},
		{"noise.step_left_var_m2_per_m", c.Noise.StepLeftVarM2PerM},
		{"noise.step_turn_var_rad2_per_rad", c.Noise.StepTurnVarRad2PerRad},
		{"noise.imu_heading_var_rad2", c.Noise.IMUHeadingVarRad2},
		{"noise.imu_turn_var_rad2_per_rad", c.Noise.IMUTurnVarRad2PerRad},
		{"noise.imu_offset_var_rad2_per_s", c.Noise.IMUOffsetVarRad2PerS},
	}
	for _, n := range noise {
		if !(n.v > 0) || !finiteAll(n.v) {
			return cfgErr(n.name, "%v must be a positive finite variance rate", n.v)
		}
	}
	for _, n := range []struct {
		name string
		v    float64
	}{
		{"noise.step_forward_var_m2_per_s", c.Noise.StepForwardVarM2PerS},
		{"noise.step_left_var_m2_per_s", c.Noise.StepLeftVarM2PerS},
		{"noise.step_turn_var_rad2_per_s", c.Noise.StepTurnVarRad2PerS},
		{"noise.imu_offset_var_rad2_per_rad", c.Noise.IMUOffsetVarRad2PerRad},
	} {
		if !(n.v >= 0) || !finiteAll(n.v) {
			return cfgErr(n.name, "%v must be a finite variance rate, not negative", n.v)
		}
	}
	return nil
}

// CheckBounds reports a configuration (after defaults) past the upper
// bounds a new robot is held to, naming the field: a client that creates a
// robot must not be able to make the service allocate without bound
// (trust.nis_window allocates its windows at creation; the others grow
// with input), and an angle beyond a full turn, a length or a duration
// far out of a small robot's range was written in another unit
// (checkUnits).
// Each bound is far beyond its use. New and Validate do not
// check them, so that a journal written before they existed restores as
// it was; the service checks them where robots are created (CreateRobot,
// configuration files).
func (c Config) CheckBounds() error {
	c = c.withDefaults()
	for _, n := range []struct {
		name    string
		v, most int64
		why     string
	}{
		{"window_ns", c.WindowNs, maxWindowNs, "5 s of history; late fixes come within a second or two"},
		{"max_held", int64(c.MaxHeld), maxHeldLimit, "inputs waiting for odometry"},
		{"recovery.count", int64(c.Recovery.Count), maxRecoveryCount, "refused fixes kept as evidence of a move"},
		{"trust.nis_window", int64(c.Trust.NISWindow), maxNISWindow, "fixes in the consistency window"},
		{"max_hold_ahead_ns", c.MaxHoldAheadNs, maxHoldAheadLimitNs, "a minute: a fix waits for odometry that comes within a second or two"},
		{"max_extrapolation_ns", c.MaxExtrapolationNs, maxExtrapolationLimitNs, "10 s: a pose predicted further past the newest odometry is no estimate"},
		{"max_odometry_gap_ns", c.MaxOdometryGapNs, maxOdometryGapLimitNs, "30 days: after a longer pause start a new run"},
	} {
		if n.v > n.most {
			return cfgErr(n.name, "%d is more than %d (%s)", n.v, n.most, n.why)
		}
	}
	if err := c.checkUnits(); err != nil {
		return err
	}
	for i, sen := range c.Sensors {
		// Validate takes any positive parameter and ignores it without
		// a robust loss; a new robot is held to values that mean one.
		f := fmt.Sprintf("sensors[%d].robust_parameter", i)
		switch p := sen.RobustParameter; {
		case math.IsNaN(p) || math.IsInf(p, 0):
			return cfgErr(f, "%v is not a number (0 for the default)", p)
		case sen.Robust == RobustHuber && p != 0 && p < minHuberK:
			return cfgErr(f, "%v is less than %g: Huber's k is in standard deviations (common practice %g), and one this small makes every fix count for almost nothing, down to a covariance no float64 holds", p, minHuberK, DefaultHuberK)
		}
	}
	// Positions as samples' (maxFieldM).
	if !lengthsOK(c.StartPose.X, c.StartPose.Y) {
		return cfgErr("start_pose", "%+v is not a field position within %g m of the origin", c.StartPose, maxFieldM)
	}
	for i, l := range c.Landmarks {
		if !lengthsOK(l.XM, l.YM) {
			return cfgErr(fmt.Sprintf("landmarks[%d]", i), "(%g, %g) is not a field position within %g m of the origin", l.XM, l.YM, maxFieldM)
		}
	}
	for i, s := range c.Sensors {
		if !lengthsOK(s.Mount.X, s.Mount.Y) {
			return cfgErr(fmt.Sprintf("sensors[%d].mount", i), "%+v is not within %g m of the robot", s.Mount, maxFieldM)
		}
		if s.LatencyNs > maxWindowNs {
			return cfgErr(fmt.Sprintf("sensors[%d].latency_ns", i), "%d is more than %d (a fix captured longer before its stamp than the longest history window could never be placed)", s.LatencyNs, int64(maxWindowNs))
		}
	}
	return nil
}

// maxRobotM bounds how far from the reference point a wheel or a sensor's
// mount may be (10 m: these are small robots, and a cart a few metres
// long is the largest), and minDurationNs the durations a configuration
// may set other than 0 (0.1 ms; no latency, window or gap is that short).
const (
	maxRobotM     = 10
	minDurationNs = 100_000
)

// checkUnits refuses the values that were written in another unit than
// their field's: an angle beyond a full turn was meant in degrees, a wheel
// or mount 120 m from the reference point in millimetres, a window of
// 1 ns in seconds, a latency of 20 ns in milliseconds (common practice:
// the units mistakes of a configuration written by hand).
func (c *Config) checkUnits() error {
	angle := func(name string, v float64) error {
		if math.Abs(v) > 2*math.Pi {
			return cfgErr(name, "%v is more than a full turn (2 pi rad): an angle in degrees? Angles are in radians", v)
		}
		return nil
	}
	far := func(name string, x, y float64) error {
		if math.Hypot(x, y) > maxRobotM {
			return cfgErr(name, "(%g, %g) is more than %d m from the reference point: millimetres? Lengths are in metres", x, y, maxRobotM)
		}
		return nil
	}
	if err := angle("start_pose.heading_rad", c.StartPose.Heading); err != nil {
		return err
	}
	for i, w := range c.Wheels {
		if err := angle(fmt.Sprintf("wheels[%d].direction_rad", i), w.DirectionRad); err != nil {
			return err
		}
	}
	for i, sen := range c.Sensors {
		if err := angle(fmt.Sprintf("sensors[%d].mount.heading_rad", i), sen.Mount.Heading); err != nil {
			return err
		}
	}
	for i, w := range c.Wheels {
		if err := far(fmt.Sprintf("wheels[%d]", i), w.XM, w.YM); err != nil {
			return err
		}
	}
	durations := []struct {
		name string
		v    int64
	}{{"window_ns", c.WindowNs}, {"imu_latency_ns", c.IMULatencyNs}, {"max_odometry_gap_ns", c.MaxOdometryGapNs}}
	for i, sen := range c.Sensors {
		if err := far(fmt.Sprintf("sensors[%d].mount", i), sen.Mount.X, sen.Mount.Y); err != nil {
			return err
		}
		durations = append(durations, struct {
			name string
			v    int64
		}{fmt.Sprintf("sensors[%d].latency_ns", i), sen.LatencyNs})
	}
	for _, d := range durations {
		if d.v > 0 && d.v < minDurationNs {
			return cfgErr(d.name, "%d ns is less than 0.1 ms: seconds or milliseconds? Durations are in nanoseconds (0 for none or the default)", d.v)
		}
	}
	return nil
}

// checkLimits checks the IMU mode, the probabilities, the counts and sizes,
// and the positive limits.
func (c *Config) checkLimits() error {
	if c.IMU > IMURotation {
		return cfgErr("imu_mode", "%d is not none, absolute or rotation", c.IMU)
	}
	probs := []struct {
		name string
		v    float64
	}{
		{"gate_probability", c.GateProbability},
		{"recovery.agree_probability", c.Recovery.AgreeProbability},
		{"trust.consistency_probability", c.Trust.ConsistencyProbability},
	}
	for _, p := range probs {
		if !(p.v > 0 && p.v < 1) {
			return cfgErr(p.name, "%v must be inside (0, 1)", p.v)
		}
		if p.v < minProbability {
			return cfgErr(p.name, "%v is less than %g: it is the probability that a consistent input passes (0.99), and one this small passes none", p.v, minProbability)
		}
	}
	ints := []struct {
		name string
		v    int64
	}{
		{"window_ns", c.WindowNs}, {"max_held", int64(c.MaxHeld)}, {"max_hold_ahead_ns", c.MaxHoldAheadNs},
		{"max_extrapolation_ns", c.MaxExtrapolationNs}, {"max_odometry_gap_ns", c.MaxOdometryGapNs}, {"recovery.count", int64(c.Recovery.Count)},
		{"trust.nis_window", int64(c.Trust.NISWindow)}, {"trust.refused_in_a_row", int64(c.Trust.RefusedInARow)},
	}
	for _, n := range ints {
		if n.v <= 0 {
			return cfgErr(n.name, "%d must be positive", n.v)
		}
	}
	if c.Recovery.Count < 2 {
		return cfgErr("recovery.count", "%d must be at least 2: one refused fix proves nothing", c.Recovery.Count)
	}
	if c.Recovery.DistinctMarkers < 1 || c.Recovery.DistinctMarkers > maxDistinctMarkers {
		return cfgErr("recovery.distinct_markers", "%d must be in [1, %d]", c.Recovery.DistinctMarkers, maxDistinctMarkers)
	}
	switch {
	case c.IMULatencyNs < 0 || c.IMULatencyNs > maxIMULatencyNs:
		return cfgErr("imu_latency_ns", "%d must be in [0, %d]", c.IMULatencyNs, int64(maxIMULatencyNs))
	case c.IMULatencyNs > 0 && c.IMU != IMUAbsolute:
		return cfgErr("imu_latency_ns", "applies to imu_mode absolute; in %s mode the IMU's heading rides on the odometry's intervals", c.IMU)
	}
	for _, p := range []struct {
		name string
		v    float64
	}{{"max_speed_m_per_s", c.MaxSpeedMPerS}, {"max_turn_rate_rad_per_s", c.MaxTurnRateRadPerS},
		{"trust.max_position95_m", c.Trust.MaxPosition95M}, {"trust.max_heading_std_rad", c.Trust.MaxHeadingStdRad}} {
		if !(p.v > 0) || !finiteAll(p.v) {
			return cfgErr(p.name, "%v must be positive", p.v)
		}
	}
	return nil
}

// checkStart checks the start pose and its covariance.
func (c *Config) checkStart() error {
	if !finiteAll(c.StartPose.X, c.StartPose.Y) || !anglesOK(c.StartPose.Heading) {
		return cfgErr("start_pose", "must be finite, its heading within %g rad of 0", maxAngleRad)
	}
	if err := estimator.CheckCovariance(c.StartCov, 3); err != nil {
		return cfgErr("start_covariance", "%v", err)
	}
	if err := checkVariances(c.StartCov, 3, poseAngle); err != nil {
		return cfgErr("start_covariance", "%v", err)
	}
	return nil
}

// checkLandmarks checks that landmark IDs are set and unique and their
// positions finite.
func (c *Config) checkLandmarks() error {
	seen := map[string]bool{}
	for i, l := range c.Landmarks {
		f := fmt.Sprintf("landmarks[%d]", i)
		if l.ID == "" {
			return cfgErr(f+".id", "must not be empty")
		}
		if seen[l.ID] {
			return cfgErr(f+".id", "%q appears twice", l.ID)
		}
		seen[l.ID] = true
		if !finiteAll(l.XM, l.YM) {
			return cfgErr(f, "position must be finite")
		}
		if !(l.PositionStdM >= 0 && l.PositionStdM <= maxLandmarkStdM) {
			return cfgErr(f+".position_std_m", "%v must be in [0, %g] m", l.PositionStdM, maxLandmarkStdM)
		}
	}
	if v := c.LandmarkPositionStdM; !(v >= 0 && v <= maxLandmarkStdM) {
		return cfgErr("landmark_position_std_m", "%v must be in [0, %g] m", v, maxLandmarkStdM)
	}
	return nil
}

// layoutRows returns the structural rows of the layout (coefficients only).
func (c *Config) layoutRows() [][3]float64 {
	var rows [][3]float64
	for _, w := range c.Wheels {
		rows = append(rows, estimator.WheelCoef(w.XM, w.YM, w.DirectionRad))
	}
	if c.IMU == IMURotation {
		rows = append(rows, estimator.TurnCoef())
	}
	if c.NoSideSlip {
		rows = append(rows, estimator.LeftCoef())
	}
	return rows
}

// checkLayout checks, by the singular values of the row matrix (gonum mat),
// that the wheel rows and the optional IMU and no-side-slip rows determine
// forward, left and turn.
func (c *Config) checkLayout() error {
	if len(c.Wheels) == 0 {
		if c.NoSideSlip {
			return cfgErr("no_side_slip", "needs wheels")
		}
		if c.IMU == IMURotation {
			return cfgErr("imu_mode", "rotation needs wheels; a robot without wheels sends body steps")
		}
		return nil
	}
	rows := c.layoutRows()
	if len(rows) < 3 {
		return cfgErr("wheels", "%d rows (wheels plus IMU and no-side-slip rows) cannot determine forward, left and turn; need 3", len(rows))
	}
	a := mat.NewDense(len(rows), 3, nil)
	for i, r := range rows {
		a.SetRow(i, r[:])
	}
	var svd mat.SVD
	if !svd.Factorize(a, mat.SVDNone) {
		return cfgErr("wheels", "layout could not be analysed")
	}
	sv := svd.Values(nil)
	if sv[2] < 1e-6*sv[0] {
		return cfgErr("wheels", "layout does not determine forward, left and turn (singular values %.3g); add a lateral wheel, set imu_mode rotation or no_side_slip", sv)
	}
	return nil
}
