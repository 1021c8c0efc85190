package fusion

import (
	"errors"
	"fmt"
	"math"

	"reckon.example/estimator"
)

// MaxSensors bounds the sensors a configuration may declare: a fix must
// name one of them, so the state a client can make a robot keep is bounded
// by its configuration.
const MaxSensors = 16

// ErrUnknownSensor reports a fix whose sensor_id names no configured
// sensor.
var ErrUnknownSensor = errors.New("unknown sensor")

// RobustLoss names the robust weighting of a sensor's fixes
// (DEVELOPERS.md, "Design: Measurement updates").
type RobustLoss uint8

const (
	// RobustNone: the ordinary Kalman update.
	RobustNone RobustLoss = iota + 1
	// RobustHuber: Huber's weight min(1, k / sqrt(NIS)) (Huber 1964).
	RobustHuber
	// RobustStudentT: the Student-t weight (nu + d - 2) / (nu + NIS), the
	// error's expected covariance given its NIS (after Roth, Ozkan and
	// Gustafsson 2013).
	RobustStudentT
)

// Default robust parameters: Huber's k = 1.345 standard deviations, the
// constant that keeps 95% efficiency at the normal distribution (common
// practice), and 4 degrees of freedom for the Student-t, a common choice
// for heavy-tailed sensor noise (common practice).
const (
	DefaultHuberK   = 1.345
	DefaultStudentT = 4.0
)

// Sensor is one configured source of fixes (DEVELOPERS.md, "Design:
// Sensors"). Zero fields take the defaults in parentheses.
type Sensor struct {
	// ID names the sensor; fixes carry it in sensor_id. "imu" is reserved.
	ID string
	// Kind is what the sensor's fixes measure; a fix of another kind is
	// refused.
	Kind FixKind
	// Mount is the sensor's pose in the body frame, used when a fix carries
	// none.
	Mount estimator.Pose
	// Cov is the default covariance of a fix (row-major, the fix kind's
	// dimension; 2x2 range and bearing for landmarks), used when a fix
	// carries none; nil: every fix must carry its own. Required with a
	// correlated error.
	Cov []float64
	// LatencyNs is how much later than the capture the sensor stamps its
	// fixes: a fix stamped stamp_ns was captured at stamp_ns - LatencyNs.
	LatencyNs int64
	// CorrelationTimeS and CorrelatedFraction describe the error's
	// exponentially correlated part: the share CorrelatedFraction (in
	// [0, 1); 0, the default, is white noise) of the covariance is a
	// first-order Gauss-Markov process with time constant
	// CorrelationTimeS seconds, held in a bias block of the state.
	CorrelationTimeS   float64
	CorrelatedFraction float64
	// CorrelatedPerLandmark (landmark sensors with a CorrelatedFraction):
	// the correlated part is each landmark's own, independent from
	// landmark to landmark (a fiducial marker's error follows its viewing
	// geometry), not one error all fixes share. The sensor then has no
	// bias block: a fix's correlated share counts at its full covariance
	// for its NIS and gate, and inflated for the gain by the AR(1) factor
	// of the time since the last applied fix of the same landmark
	// (DEVELOPERS.md, "Design: Sensors"; markercorr.go).
	CorrelatedPerLandmark bool
	// Robust is the robust weighting of the sensor's fixes (none).
	Robust RobustLoss
	// RobustParameter is Huber's k in standard deviations (1.345) or the
	// Student-t degrees of freedom (4).
	RobustParameter float64
	// MountStd is the standard deviation of Mount's error (x and y in
	// metres, heading in radians); when any is positive the state carries
	// the error as a mount block of three consider states (DEVELOPERS.md,
	// "Design: Sensors"). All zero: the mount is exact.
	MountStd [3]float64
}

// mountStdFloor is the least standard deviation a mount block gives a
// component configured as 0 (1 um or 1 urad), which keeps its prior
// covariance positive definite.
const mountStdFloor = 1e-6

// mountSpec returns the sensor's mount block, and false when it has none.
func (s *Sensor) mountSpec() (estimator.BiasSpec, bool) {
	if s.MountStd == [3]float64{} {
		return estimator.BiasSpec{}, false
	}
	b := estimator.BiasSpec{Dim: 3, Mount: true}
	for i, v := range s.MountStd {
		v = math.Max(v, mountStdFloor)
		b.Cov[i*3+i] = v * v
	}
	return b, true
}

// Calibration makes odometry calibrate itself online: scale states for
// the forward travel and the turn, and a heading-rate bias, estimated as
// random constants or slow random walks (DEVELOPERS.md, "Design: State").
// Zero fields take the defaults in parentheses.
type Calibration struct {
	// Scale adds forward_scale and turn_scale: the true step is
	// (s_f forward, s_f left, s_t turn), both near 1.
	Scale bool
	// ScaleStd is the prior standard deviation of both scales (0.1).
	ScaleStd float64
	// ForwardScaleVarPerM and TurnScaleVarPerRad are the scales' random
	// walks per metre travelled and per radian turned (0: constant).
	ForwardScaleVarPerM float64
	TurnScaleVarPerRad  float64
	// RateBias adds a heading-rate bias b_r: the true turn gains b_r dt.
	// It needs an absolute heading reference: an absolute IMU, or a sensor
	// of pose, heading or landmark fixes.
	RateBias bool
	// RateBiasStdRadPerS is the rate bias's prior standard deviation
	// (0.01 rad/s).
	RateBiasStdRadPerS float64
	// RateBiasVarRad2PerS3 is its random walk, (rad/s)^2 per second (0:
	// constant).
	RateBiasVarRad2PerS3 float64
	// NoiseRatioStd is how well the odometry's configured noise is known,
	// as the standard deviation of the ratio of the true noise to it
	// (0.5): the turn scale's update takes out the pull the configured
	// noise of the reported turns would give it, and carries the spread
	// of that pull over the ratio in its covariance, a consider parameter
	// (DEVELOPERS.md, "Design: State"). The default covers a true noise
	// anywhere from none to 1.5 times the configured (the root mean square
	// of the ratio's departure from 1 over that range); a noise fitted
	// with `reckon tune` from long runs is known better. 0 takes the
	// default; a tiny value (1e-9) leaves the spread out.
	NoiseRatioStd float64
	// GyroScaleStd adds, with imu_mode absolute, a gyro scale state g
	// (dimensionless, near 0) of this prior standard deviation; 0 (the
	// default) adds none. A gyro whose scale factor is off by a fraction f
	// reads every turn f of it wrong: its heading zero moves by g = f /
	// (1 + f) times the IMU's own turn, which the filter applies between
	// consecutive IMU headings and so estimates g (DEVELOPERS.md, "Design:
	// State"). 0.03 covers an uncalibrated MEMS gyro (1% to 3%, from
	// memory); at most maxGyroScaleStd. It takes a state: a configuration
	// whose state has no room for it is refused.
	GyroScaleStd float64
}

// maxGyroScaleStd is the most Calibration.GyroScaleStd may be: a gyro off
// by half of every turn is broken, not uncalibrated, and the linearised
// step g dpsi is no model of it.
const maxGyroScaleStd = 0.5

// maxNoiseRatioStd is the most Calibration.NoiseRatioStd a new robot may
// have (Config.CheckBounds): a true noise spread evenly from none to 20
// times the configured has a ratio whose departure from 1 has a root mean
// square of 10.7; beyond that the noise is not known at all.
const maxNoiseRatioStd = 10

// fixDim returns the dimension of a fix kind's full measurement (a
// landmark's range and bearing).
func fixDim(k FixKind) int {
	switch k {
	case FixPose:
		return 3
	case FixPosition, FixLandmark:
		return 2
	case FixHeading:
		return 1
	}
	return 0
}

// fixAngle reports whether component i of a fix kind's full measurement is
// an angle.
func fixAngle(k FixKind, i int) bool {
	switch k {
	case FixPose:
		return i == 2
	case FixHeading:
		return true
	case FixLandmark:
		return i == 1
	}
	return false
}

// withDefaults returns s with its zero robust parameter set.
func (s Sensor) withDefaults() Sensor {
	if s.Robust == 0 {
		s.Robust = RobustNone
	}
	if s.RobustParameter == 0 {
		switch s.Robust {
		case RobustHuber:
			s.RobustParameter = DefaultHuberK
		case RobustStudentT:
			s.RobustParameter = DefaultStudentT
		}
	}
	return s
}

// robust returns the estimator's robust model of the sensor.
func (s *Sensor) robust() estimator.Robust {
	switch s.Robust {
	case RobustHuber:
		return estimator.Robust{Kind: estimator.RobustHuber, Param: s.RobustParameter}
	case RobustStudentT:
		return estimator.Robust{Kind: estimator.RobustStudentT, Param: s.RobustParameter}
	}
	return estimator.Robust{}
}

// biasSpec returns the sensor's bias block: the kind's dimension, its
// correlation time and the correlated share of its covariance.
func (s *Sensor) biasSpec() estimator.BiasSpec {
	d := fixDim(s.Kind)
	b := estimator.BiasSpec{Dim: d, TauS: s.CorrelationTimeS}
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			b.Cov[i*3+j] = s.CorrelatedFraction * s.Cov[i*d+j]
		}
	}
	return b
}

// checkSensors checks the sensors and that the state they and the
// calibration ask for fits.
func (c *Config) checkSensors() error {
	if len(c.Sensors) > MaxSensors {
		return cfgErr("sensors", "%d sensors, at most %d", len(c.Sensors), MaxSensors)
	}
	seen := map[string]bool{}
	for i, s := range c.Sensors {
		f := fmt.Sprintf("sensors[%d]", i)
		if s.ID == "" || s.ID == imuSensor {
			return cfgErr(f+".id", "%q: must be set and not %q (the IMU's name)", s.ID, imuSensor)
		}
		if seen[s.ID] {
			return cfgErr(f+".id", "%q appears twice", s.ID)
		}
		seen[s.ID] = true
		d := fixDim(s.Kind)
		if d == 0 {
			return cfgErr(f+".kind", "%d is not pose, position, heading or landmark", s.Kind)
		}
		if !finiteAll(s.Mount.X, s.Mount.Y) || !anglesOK(s.Mount.Heading) {
			return cfgErr(f+".mount", "must be finite, its heading within %g rad of 0", maxAngleRad)
		}
		if m := s.MountStd; !finiteAll(m[:]...) || m[0] < 0 || m[1] < 0 || m[2] < 0 || m[0] > 10 || m[1] > 10 || m[2] > math.Pi {
			return cfgErr(f+".mount_std", "%v must be finite, not negative, at most 10 m and pi rad", m)
		}
		if s.Cov != nil {
			if err := estimator.CheckCovariance(s.Cov, d); err != nil {
				return cfgErr(f+".covariance", "%s sensor (%dx%d): %v", s.Kind, d, d, err)
			}
			if err := checkVariances(s.Cov, d, func(i int) bool { return fixAngle(s.Kind, i) }); err != nil {
				return cfgErr(f+".covariance", "%v", err)
			}
		}
		if s.LatencyNs < 0 {
			return cfgErr(f+".latency_ns", "%d must not be negative", s.LatencyNs)
		}
		if !(s.CorrelatedFraction >= 0 && s.CorrelatedFraction < 1) {
			return cfgErr(f+".correlated_fraction", "%v must be in [0, 1)", s.CorrelatedFraction)
		}
		if !(s.CorrelationTimeS >= 0) || math.IsInf(s.CorrelationTimeS, 0) {
			return cfgErr(f+".correlation_time_s", "%v must be a finite time, not negative", s.CorrelationTimeS)
		}
		if s.CorrelatedPerLandmark && s.Kind != FixLandmark {
			return cfgErr(f+".correlated_per_landmark", "is for landmark sensors (their fixes name a landmark); this one gives %s fixes", s.Kind)
		}
		if s.CorrelatedFraction > 0 {
			if s.CorrelationTimeS == 0 {
				return cfgErr(f+".correlation_time_s", "must be set with a correlated_fraction")
			}
			if s.Cov == nil {
				return cfgErr(f+".covariance", "must be set with a correlated_fraction: it scales the bias")
			}
		}
		if s.Robust > RobustStudentT {
			return cfgErr(f+".robust", "%d is not none, huber or student_t", s.Robust)
		}
		if !(s.RobustParameter > 0) || math.IsInf(s.RobustParameter, 0) {
			if s.Robust != RobustNone {
				return cfgErr(f+".robust_parameter", "%v must be positive and finite", s.RobustParameter)
			}
		}
		if s.Robust == RobustStudentT && s.RobustParameter != 0 && !(s.RobustParameter > 1) {
			// The update's covariance weight (nu + d - 2) / (nu + NIS) must
			// be positive for a one-dimensional fix too (estimator.StudentTCovWeight).
			return cfgErr(f+".robust_parameter", "%v degrees of freedom: a Student-t sensor needs more than 1", s.RobustParameter)
		}
	}
	return nil
}

// checkCalibration checks the odometry calibration options.
func (c *Config) checkCalibration() error {
	k := &c.Calibration
	for _, v := range []struct {
		name     string
		v        float64
		positive bool
	}{
		{"calibration.scale_std", k.ScaleStd, true},
		{"calibration.forward_scale_var_per_m", k.ForwardScaleVarPerM, false},
		{"calibration.turn_scale_var_per_rad", k.TurnScaleVarPerRad, false},
		{"calibration.rate_bias_std_rad_per_s", k.RateBiasStdRadPerS, true},
		{"calibration.rate_bias_var_rad2_per_s3", k.RateBiasVarRad2PerS3, false},
		{"calibration.noise_ratio_std", k.NoiseRatioStd, true},
	} {
		if !finiteAll(v.v) || v.v < 0 || v.positive && v.v == 0 {
			return cfgErr(v.name, "%v must be a finite positive value", v.v)
		}
	}
	// Its square is the variance the turn scale's updates add: past
	// float64's range every update taking a pull out failed (CheckBounds
	// holds a new robot to maxNoiseRatioStd).
	if math.IsInf(k.NoiseRatioStd*k.NoiseRatioStd, 0) {
		return cfgErr("calibration.noise_ratio_std", "%v squared is not a finite variance", k.NoiseRatioStd)
	}
	if g := k.GyroScaleStd; !finiteAll(g) || g < 0 || g > maxGyroScaleStd {
		return cfgErr("calibration.gyro_scale_std", "%v must be a finite standard deviation from 0 (none) to %g (a gyro off by more than half of every turn is broken)", g, maxGyroScaleStd)
	}
	if k.GyroScaleStd > 0 && c.IMU != IMUAbsolute {
		return cfgErr("calibration.gyro_scale_std", "needs imu_mode absolute (the gyro scale moves the absolute IMU's offset); imu_mode is %s", c.IMU)
	}
	if k.RateBias {
		ok := c.IMU == IMUAbsolute
		for _, s := range c.Sensors {
			ok = ok || s.Kind == FixPose || s.Kind == FixHeading || s.Kind == FixLandmark
		}
		if !ok {
			return cfgErr("calibration.rate_bias", "needs an absolute heading reference: imu_mode absolute, or a sensor of pose, heading or landmark fixes")
		}
	}
	return nil
}

// layoutSpec returns the state layout the configuration asks for and, for
// each sensor, the index of its bias block's first state (0: none).
func (c *Config) layoutSpec() (estimator.LayoutSpec, []int) {
	spec := estimator.LayoutSpec{IMUOffset: c.IMU == IMUAbsolute, OdometryScale: c.Calibration.Scale, RateBias: c.Calibration.RateBias,
		GyroScale: c.IMU == IMUAbsolute && c.Calibration.GyroScaleStd > 0, NoiseRatioStd: c.Calibration.NoiseRatioStd}
	at := fixedStates(&spec)
	first := make([]int, len(c.Sensors))
	for i := range c.Sensors {
		s := &c.Sensors[i]
		if s.CorrelatedFraction > 0 && !s.perLandmark() {
			b := s.biasSpec()
			spec.Biases = append(spec.Biases, b)
			first[i] = at
			at += b.Dim
		}
	}
	// The mount blocks follow the bias blocks, so that a configuration
	// without mount errors keeps its layout.
	for i := range c.Sensors {
		if b, ok := c.Sensors[i].mountSpec(); ok {
			spec.Biases = append(spec.Biases, b)
			at += b.Dim
		}
	}
	// The landmark blocks come last, as many as fit (at most
	// maxLandmarkBlocks), so that the blocks before keep their places.
	if v := c.landmarkVarMax(); v > 0 {
		for k := 0; k < maxLandmarkBlocks && at+2 <= estimator.MaxStates; k++ {
			spec.Biases = append(spec.Biases, estimator.BiasSpec{Dim: 2, Landmark: true, Cov: [9]float64{v, 0, 0, 0, v}})
			at += 2
		}
	}
	return spec, first
}

// fixedStates returns the number of states before the bias blocks in
// the layout of spec: the pose and the optional states that do not depend
// on the sensors.
func fixedStates(spec *estimator.LayoutSpec) int {
	at := 3
	for _, b := range []bool{spec.IMUOffset, spec.OdometryScale, spec.OdometryScale, spec.RateBias, spec.GyroScale} {
		if b {
			at++
		}
	}
	return at
}

// mountStates returns, for each sensor, the index of its mount block's
// first state (0: none), in the layout of layoutSpec.
func (c *Config) mountStates() []int {
	spec, _ := c.layoutSpec()
	at := fixedStates(&spec)
	for _, b := range spec.Biases {
		if !b.Mount && !b.Landmark {
			at += b.Dim
		}
	}
	out := make([]int, len(c.Sensors))
	for i := range c.Sensors {
		if _, ok := c.Sensors[i].mountSpec(); ok {
			out[i] = at
			at += 3
		}
	}
	return out
}

// checkState checks that the layout fits in the filter.
func (c *Config) checkState() error {
	spec, _ := c.layoutSpec()
	if spec.GyroScale {
		// The gyro scale comes before the sensors' blocks: a layout that
		// fits without it and not with it is its doing.
		without := spec
		without.GyroScale = false
		_, errWithout := estimator.NewLayout(without)
		if _, err := estimator.NewLayout(spec); err != nil && errWithout == nil {
			return cfgErr("calibration.gyro_scale_std", "no room in the state for the gyro scale (1 state; at most %d in all, which the sensors' bias and mount blocks take): %v; set it to 0 and keep noise.imu_offset_var_rad2_per_rad, or take a block out", estimator.MaxStates, err)
		}
	}
	if _, err := estimator.NewLayout(spec); err != nil {
		return cfgErr("sensors", "the state does not fit: %v (each correlated sensor adds its fix's dimension)", err)
	}
	if c.landmarkVarMax() > 0 && (len(spec.Biases) == 0 || !spec.Biases[len(spec.Biases)-1].Landmark) {
		return cfgErr("landmark_position_std_m", "no room in the state for a landmark block (2 states; at most %d in all): the landmarks' survey error needs one, or set it to 0", estimator.MaxStates)
	}
	return nil
}

// initialState writes the configured initial mean and covariance of the
// optional states (scales 1, rate bias and biases 0; prior variances; each
// bias block at its stationary covariance) into x and p (n x n).
func (c *Config) initialState(l *estimator.Layout, x, p []float64) {
	n := l.Size()
	if i := l.ForwardScale(); i >= 0 {
		v := c.Calibration.ScaleStd * c.Calibration.ScaleStd
		j := l.TurnScale()
		x[i], x[j] = 1, 1
		p[i*n+i], p[j*n+j] = v, v
	}
	if i := l.RateBias(); i >= 0 {
		p[i*n+i] = c.Calibration.RateBiasStdRadPerS * c.Calibration.RateBiasStdRadPerS
	}
	if i := l.GyroScale(); i >= 0 {
		p[i*n+i] = c.Calibration.GyroScaleStd * c.Calibration.GyroScaleStd
	}
	specs := c.biasSpecs()
	for k := 0; k < l.Biases(); k++ {
		at, dim := l.Bias(k)
		spec := &specs[k]
		for a := 0; a < dim; a++ {
			for b := 0; b < dim; b++ {
				p[(at+a)*n+at+b] = spec.Cov[a*3+b]
			}
		}
	}
}

// biasSpecs returns the bias blocks in layout order.
func (c *Config) biasSpecs() []estimator.BiasSpec {
	spec, _ := c.layoutSpec()
	return spec.Biases
}

// sensorFix fills the sensor-dependent parts of m for fix f from sensor s
// with bias block at first and mount block at mount (0: none): mount and
// its error states, covariance (the white part), bias states and robust
// model.
func (s *Sensor) sensorFix(f *Fix, first, mount int, m *estimator.Measurement) error {
	if f.Kind != s.Kind {
		return FieldErrorf(ErrBadSample, "sensor_id", "sensor %q gives %s fixes, not %s", s.ID, s.Kind, f.Kind)
	}
	m.Mount, m.MountError = s.Mount, mount
	if f.Mount != nil {
		m.Mount, m.MountError = *f.Mount, 0
	}
	if !finiteAll(m.Mount.X, m.Mount.Y) || !anglesOK(m.Mount.Heading) {
		return badf("mount %+v is not finite, or its heading not within %g rad of 0", m.Mount, maxAngleRad)
	}
	if !lengthsOK(m.Mount.X, m.Mount.Y) {
		return badf("mount %+v is not within %g m of the robot", m.Mount, maxFieldM)
	}
	// comps are the fix's components within the kind's full measurement
	// (a range-only landmark fix is component 0, bearing-only 1).
	d := m.Kind.Dim()
	comps := [3]int{0, 1, 2}
	if m.Kind == estimator.KindBearing {
		comps[0] = 1
	}
	cov := f.Cov
	if len(cov) == 0 {
		if s.Cov == nil {
			return badf("the fix carries no covariance and sensor %q has none", s.ID)
		}
		full := fixDim(s.Kind)
		cov = make([]float64, d*d)
		for i := 0; i < d; i++ {
			for j := 0; j < d; j++ {
				cov[i*d+j] = s.Cov[comps[i]*full+comps[j]]
			}
		}
	}
	if err := estimator.CheckCovariance(cov, d); err != nil {
		return badf("cov for a %s fix (%dx%d): %v", f.Kind, d, d, err)
	}
	if err := checkVariances(cov, d, func(i int) bool { return m.Kind.IsAngle(i) }); err != nil {
		return badf("cov for a %s fix: %v", f.Kind, err)
	}
	white := 1 - s.CorrelatedFraction
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			m.R[i*3+j] = white * cov[i*d+j]
		}
		if first > 0 {
			m.Bias[i] = first + comps[i]
		}
	}
	if s.perLandmark() {
		// No bias block: the correlated share is noise of the fix's own,
		// in full for its NIS and gate (markercorr.go).
		var c [9]float64
		s.correlatedShare(m.Kind, 1, &c)
		for k := range c {
			m.R[k] += c[k]
		}
	}
	m.Robust = s.robust()
	return nil
}
