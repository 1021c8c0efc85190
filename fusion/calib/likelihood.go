package calib

import (
	"cmp"
	"errors"
	"fmt"
	"math"
	"slices"

	"reckon.example/fusion"
)

// This file is the likelihood of a recorded run under candidate noise
// levels: the run replayed through a real fusion.Robot, and the
// log-likelihood of every innovation summed (the prediction-error
// decomposition; F. C. Schweppe, IEEE Trans. Information Theory 11(1),
// 1965; Shumway and Stoffer, Time Series Analysis and Its Applications,
// 4th ed., sec. 6.3). likelihood_fit.go maximises it; likelihood_check.go
// has the consistency checks. DEVELOPERS.md, "Design: Noise by likelihood".

// ErrNoInnovations: the run gave no innovation to fit (no IMU heading and
// no fix applied).
var ErrNoInnovations = errors.New("the run has no innovations: no IMU heading or fix was applied (none is without odometry)")

// levelKind says how a NoiseLevel acts on a configuration.
type levelKind uint8

const (
	levelNoise    levelKind = iota // a field of fusion.Noise
	levelCovScale                  // a factor on a sensor's covariance
	levelCorrTime                  // a sensor's correlation_time_s
	levelTail                      // a Student-t sensor's degrees of freedom
	levelSurvey                    // the map's landmark_position_std_m
)

// NoiseLevel is one noise level of a configuration that the likelihood fit
// can tune.
type NoiseLevel struct {
	// Field is the configuration field, snake_case as in the YAML file
	// ("noise.wheel_var_m2_per_m", "sensors[0].covariance").
	Field string
	// Unit is the level's unit; a sensor's covariance is tuned by a
	// dimensionless factor on every entry of its covariance (and of the
	// covariances its fixes carry), 1 as configured.
	Unit string
	// Sensor is the index of the sensor in the configuration's Sensors for
	// a sensor's level, -1 for the others.
	Sensor int
	kind   levelKind
	noise  func(*fusion.Noise) *float64
}

// noiseLevels are the levels of fusion.Noise, with when a configuration
// uses them (a term the configuration does not use changes nothing).
var noiseLevels = []struct {
	field, unit string
	ptr         func(*fusion.Noise) *float64
	used        func(c *fusion.Config) bool
}{
	{"noise.wheel_var_m2_per_m", "m^2/m", func(n *fusion.Noise) *float64 { return &n.WheelVarM2PerM }, wheels},
	{"noise.lateral_slip_var_m2_per_m", "m^2/m", func(n *fusion.Noise) *float64 { return &n.LateralSlipVarM2PerM }, func(c *fusion.Config) bool { return wheels(c) && c.NoSideSlip }},
	{"noise.turn_var_rad2_per_rad", "rad^2/rad", func(n *fusion.Noise) *float64 { return &n.TurnVarRad2PerRad }, func(c *fusion.Config) bool { return wheels(c) && c.IMU != fusion.IMURotation }},
	{"noise.imu_turn_var_rad2_per_rad", "rad^2/rad", func(n *fusion.Noise) *float64 { return &n.IMUTurnVarRad2PerRad }, func(c *fusion.Config) bool { return c.IMU == fusion.IMURotation }},
	{"noise.step_forward_var_m2_per_m", "m^2/m", func(n *fusion.Noise) *float64 { return &n.StepForwardVarM2PerM }, steps},
	{"noise.step_left_var_m2_per_m", "m^2/m", func(n *fusion.Noise) *float64 { return &n.StepLeftVarM2PerM }, steps},
	{"noise.step_turn_var_rad2_per_rad", "rad^2/rad", func(n *fusion.Noise) *float64 { return &n.StepTurnVarRad2PerRad }, steps},
	{"noise.step_forward_var_m2_per_s", "m^2/s", func(n *fusion.Noise) *float64 { return &n.StepForwardVarM2PerS }, steps},
	{"noise.step_left_var_m2_per_s", "m^2/s", func(n *fusion.Noise) *float64 { return &n.StepLeftVarM2PerS }, steps},
	{"noise.step_turn_var_rad2_per_s", "rad^2/s", func(n *fusion.Noise) *float64 { return &n.StepTurnVarRad2PerS }, steps},
	{"noise.heading_var_rad2_per_s", "rad^2/s", func(n *fusion.Noise) *float64 { return &n.HeadingVarRad2PerS }, func(c *fusion.Config) bool { return c.IMU != fusion.IMURotation }},
	{"noise.imu_heading_var_rad2", "rad^2", func(n *fusion.Noise) *float64 { return &n.IMUHeadingVarRad2 }, func(c *fusion.Config) bool { return c.IMU == fusion.IMUAbsolute }},
	{"noise.imu_offset_var_rad2_per_s", "rad^2/s", func(n *fusion.Noise) *float64 { return &n.IMUOffsetVarRad2PerS }, func(c *fusion.Config) bool { return c.IMU == fusion.IMUAbsolute || c.IMU == fusion.IMURotation }},
	{"noise.imu_offset_var_rad2_per_rad", "rad^2/rad", func(n *fusion.Noise) *float64 { return &n.IMUOffsetVarRad2PerRad }, func(c *fusion.Config) bool { return c.IMU == fusion.IMUAbsolute }},
}

func wheels(c *fusion.Config) bool { return len(c.Wheels) > 0 }

// landmarkSensor reports whether a sensor of c takes landmark fixes.
func landmarkSensor(c *fusion.Config) bool {
	for i := range c.Sensors {
		if c.Sensors[i].Kind == fusion.FixLandmark {
			return true
		}
	}
	return false
}
func steps(c *fusion.Config) bool { return len(c.Wheels) == 0 }

// Levels returns the noise levels that the configuration uses, in a fixed
// order: the terms of fusion.Noise its odometry and IMU use (a per-second
// body-step term and the IMU offset's walk per radian only when set: zero
// leaves it out, and a log scale cannot start from zero), then per sensor its covariance factor, its correlation
// time when it has a correlated part, and its degrees of freedom when it is
// Student-t weighted, and the map's survey error when it is set and a
// sensor takes landmark fixes. cfg must be valid.
func Levels(cfg fusion.Config) []NoiseLevel {
	cfg = withDefaults(cfg)
	var out []NoiseLevel
	for _, l := range noiseLevels {
		if !l.used(&cfg) || !(*l.ptr(&cfg.Noise) > 0) {
			continue
		}
		out = append(out, NoiseLevel{Field: l.field, Unit: l.unit, Sensor: -1, kind: levelNoise, noise: l.ptr})
	}
	if cfg.LandmarkPositionStdM > 0 && landmarkSensor(&cfg) {
		out = append(out, NoiseLevel{Field: "landmark_position_std_m", Unit: "m", Sensor: -1, kind: levelSurvey})
	}
	for i, s := range cfg.Sensors {
		f := fmt.Sprintf("sensors[%d]", i)
		out = append(out, NoiseLevel{Field: f + ".covariance", Unit: "factor", Sensor: i, kind: levelCovScale})
		if s.CorrelatedFraction > 0 {
			out = append(out, NoiseLevel{Field: f + ".correlation_time_s", Unit: "s", Sensor: i, kind: levelCorrTime})
		}
		if s.Robust == fusion.RobustStudentT {
			out = append(out, NoiseLevel{Field: f + ".robust_parameter", Unit: "degrees of freedom", Sensor: i, kind: levelTail})
		}
	}
	return out
}

// withDefaults returns cfg with its defaults filled in, as a robot holds
// it; cfg must be valid.
func withDefaults(cfg fusion.Config) fusion.Config {
	r, err := fusion.New(cfg)
	if err != nil {
		panic(fmt.Sprintf("calib: invalid configuration: %v", err))
	}
	return r.Config()
}

// Value returns the level's value in cfg (a covariance factor is 1).
func (l NoiseLevel) Value(cfg *fusion.Config) float64 {
	switch l.kind {
	case levelNoise:
		return *l.noise(&cfg.Noise)
	case levelCorrTime:
		return cfg.Sensors[l.Sensor].CorrelationTimeS
	case levelTail:
		return cfg.Sensors[l.Sensor].RobustParameter
	case levelSurvey:
		return cfg.LandmarkPositionStdM
	}
	return 1
}

// set sets the level to v in cfg, whose Sensors must be cfg's own copy; a
// covariance factor multiplies the sensor's covariance into a new slice.
func (l NoiseLevel) set(cfg *fusion.Config, v float64) {
	switch l.kind {
	case levelNoise:
		*l.noise(&cfg.Noise) = v
	case levelCovScale:
		s := &cfg.Sensors[l.Sensor]
		cov := make([]float64, len(s.Cov))
		for i, c := range s.Cov {
			cov[i] = c * v
		}
		s.Cov = cov
	case levelCorrTime:
		cfg.Sensors[l.Sensor].CorrelationTimeS = v
	case levelTail:
		cfg.Sensors[l.Sensor].RobustParameter = v
	case levelSurvey:
		cfg.LandmarkPositionStdM = v
	}
}

// Apply returns cfg with the levels set to values (in the levels' units; a
// covariance factor multiplies the sensor's covariance in cfg).
func Apply(cfg fusion.Config, levels []NoiseLevel, values []float64) fusion.Config {
	if len(levels) != len(values) {
		panic(fmt.Sprintf("calib: %d levels, %d values", len(levels), len(values)))
	}
	cfg.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
	for i, l := range levels {
		l.set(&cfg, values[i])
	}
	return cfg
}

// replayer replays one recorded run under candidate noise levels.
type replayer struct {
	base   fusion.Config // defaults filled in, the fit's gate
	inputs []RecordedInput
	levels []NoiseLevel
	// order is the inputs' indices in stamp order (a fix at its capture
	// time), odometry first at one stamp.
	order []int
	// skip marks the inputs left out of the fit: gross outliers.
	skip []bool
	// sensor maps a sensor id to its index in base.Sensors.
	sensor map[string]int
	cov    [9]float64 // a fix's own covariance, scaled
}

// fitGateProbability is the fix gate of every replay of a fit: wide, so
// that the likelihood of the fixes it keeps is evaluated on the same fixes
// whatever the levels (fixes gated at the configured levels would otherwise
// fall out as the levels shrink and come back as they grow, and the
// optimiser would follow). It is the quantile of fusion's fix_disagrees
// ("Design: Trust"): a consistent filter sees one fix in a million beyond it.
const fitGateProbability = 1 - 1e-6

func newReplayer(cfg fusion.Config, inputs []RecordedInput, levels []NoiseLevel) *replayer {
	cfg = withDefaults(cfg)
	cfg.GateProbability = fitGateProbability
	p := &replayer{base: cfg, inputs: inputs, levels: levels, skip: make([]bool, len(inputs)), sensor: map[string]int{}}
	for i, s := range cfg.Sensors {
		p.sensor[s.ID] = i
	}
	p.order = make([]int, len(inputs))
	for i := range p.order {
		p.order[i] = i
	}
	slices.SortStableFunc(p.order, func(a, b int) int {
		sa, oa := p.stampOf(a)
		sb, ob := p.stampOf(b)
		return cmp.Or(cmp.Compare(sa, sb), cmp.Compare(oa, ob))
	})
	return p
}

// stampOf returns input i's place in stamp order: its stamp (a fix's
// capture time, an IMU heading's reading) and 0 for odometry, 1 for the
// rest.
func (p *replayer) stampOf(i int) (int64, int) {
	in := &p.inputs[i]
	switch {
	case in.Odometry != nil:
		return in.Odometry.StampNs, 0
	case in.Heading != nil:
		return in.Heading.StampNs - p.base.IMULatencyNs, 1
	}
	t := in.Fix.StampNs
	if si, ok := p.sensor[in.Fix.SensorID]; ok {
		t -= p.base.Sensors[si].LatencyNs
	}
	return t, 1
}

// config returns the base configuration with the levels at values, and
// each sensor's covariance factor (for the covariances fixes carry).
func (p *replayer) config(values []float64) (fusion.Config, []float64) {
	cfg := Apply(p.base, p.levels, values)
	scale := make([]float64, len(cfg.Sensors))
	for i := range scale {
		scale[i] = 1
	}
	for i, l := range p.levels {
		if l.kind == levelCovScale {
			scale[l.Sensor] = values[i]
		}
	}
	return cfg, scale
}

// run replays the run with the levels at values, in stamp order (which
// gives the innovations of arrival order, TestInnovationsInStampOrder, and
// spares the late fixes' rewinds), handing every final innovation to each with the Student-t degrees of freedom of its sensor
// (0: Gaussian). A configuration the levels make invalid is an error.
func (p *replayer) run(values []float64, each func(in *fusion.Innovation, nu float64)) error {
	cfg, scale := p.config(values)
	return p.runConfig(cfg, scale, each)
}

// runConfig replays the run under cfg (run), the covariances that fixes
// carry scaled by scale per sensor.
func (p *replayer) runConfig(cfg fusion.Config, scale []float64, each func(in *fusion.Innovation, nu float64)) error {
	r, err := fusion.New(cfg)
	if err != nil {
		return err
	}
	r.CollectInnovations()
	nus := make([]float64, len(cfg.Sensors))
	for i, s := range cfg.Sensors {
		if s.Robust == fusion.RobustStudentT {
			nus[i] = s.RobustParameter
		}
	}
	hand := func(ins []fusion.Innovation) {
		for i := range ins {
			in := &ins[i]
			if in.Initialised || in.Failed {
				continue
			}
			nu := 0.0
			if si, ok := p.sensor[in.SensorID]; ok {
				nu = nus[si]
			}
			each(in, nu)
		}
	}
	for k, i := range p.order {
		if p.skip[i] {
			continue
		}
		in := &p.inputs[i]
		if f := in.Fix; f != nil && len(f.Cov) > 0 {
			if si, ok := p.sensor[f.SensorID]; ok && scale[si] != 1 && len(f.Cov) <= len(p.cov) {
				fx := *f
				fx.Cov = p.cov[:len(f.Cov)]
				for j, c := range f.Cov {
					fx.Cov[j] = c * scale[si]
				}
				r.AddFix(fx)
				continue
			}
		}
		in.feed(r)
		if k%4096 == 0 {
			hand(r.TakeInnovations())
		}
	}
	hand(r.FinishInnovations())
	return nil
}

// logLik returns the run's log-likelihood with the levels at values and
// how many innovations it summed.
func (p *replayer) logLik(values []float64) (ll float64, n int, err error) {
	err = p.run(values, func(in *fusion.Innovation, nu float64) {
		ll += innovationLogLik(in.Outcome.NIS, in.Outcome.LogDetS, in.Outcome.Dim, nu)
		n++
	})
	if err == nil && n == 0 {
		err = ErrNoInnovations
	}
	return ll, n, err
}

// innovationLogLik is the log density of one innovation of dimension d
// with normalised square nis and log det S: Gaussian,
// -(log det S + NIS + d log 2pi) / 2, or for nu > 0 the multivariate
// Student-t of scale S and nu degrees of freedom,
// log Gamma((nu + d)/2) - log Gamma(nu/2) - (d/2) log(nu pi)
// - (log det S)/2 - ((nu + d)/2) log(1 + NIS/nu) (Kotz and Nadarajah,
// Multivariate t Distributions and Their Applications, 2004, eq. 1.1),
// the model of a Student-t weighted sensor ("Design: Sensors"), whose
// scale the filter takes to be the fix's covariance.
func innovationLogLik(nis float64, logDetS float64, d int, nu float64) float64 {
	fd := float64(d)
	if nu <= 0 {
		return -0.5 * (logDetS + nis + fd*math.Log(2*math.Pi))
	}
	a, _ := math.Lgamma((nu + fd) / 2)
	b, _ := math.Lgamma(nu / 2)
	return a - b - fd/2*math.Log(nu*math.Pi) - 0.5*logDetS - (nu+fd)/2*math.Log1p(nis/nu)
}
