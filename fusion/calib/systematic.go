package calib

import (
	"errors"
	"fmt"
	"math"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// ErrSystematic marks every error of FitSystematic: a configuration that
// does not validate, a run without the odometry and fixes a fit needs, or
// a fit without standard errors (its information matrix singular at the
// solution).
var ErrSystematic = errors.New("systematic fit")

// ParamKind says what a systematic parameter is.
type ParamKind uint8

const (
	// WheelScale is one wheel's scale: its true travel over the travel it
	// reports (dimensionless, 1 when right). With counts, counts_per_m is
	// divided by it.
	WheelScale ParamKind = iota + 1
	// WheelSpread scales every wheel's body position about the reference
	// point (dimensionless): the track width of a differential drive is
	// the configured one times it, and the turn the wheels give is the
	// configured one over it.
	WheelSpread
	// IMUTurnScale is the true turn over the turn an IMU in rotation mode
	// reports (dimensionless).
	IMUTurnScale
	// StepForwardScale and StepTurnScale scale the body steps a robot
	// reports itself: the true step is (s_f forward, s_f left, s_t turn).
	StepForwardScale
	StepTurnScale
	// MountX, MountY (metres, body frame) and MountHeading (radians) are a
	// fix sensor's mount.
	MountX
	MountY
	MountHeading
	// Latency is how long after the capture a sensor stamps its fixes,
	// seconds (the configuration's latency_ns over 1e9).
	Latency
)

// Param is one systematic parameter of a fit.
type Param struct {
	Kind ParamKind
	// Index is the wheel's index in Config.Wheels (WheelScale) or the
	// sensor's in Config.Sensors (mount and latency); 0 otherwise.
	Index int
	// Name says what the parameter is, in the configuration's words
	// ("wheels[1] (right) scale", "sensors[0] (camera) mount.x_m").
	Name string
	// Unit is the parameter's unit: "", "m", "rad" or "s".
	Unit string
	// Configured is its value as configured (scales: 1); Fitted its fitted
	// value; StdErr the fitted value's standard error (the larger of the
	// model's and the segment-robust one, see FitSystematic).
	Configured, Fitted, StdErr float64
	// ModelStdErr is the standard error under the stated noise alone (the
	// sandwich of FitSystematic, which weights the fixes by their sensors'
	// Gauss-Markov model); StdErr is the larger of it and the
	// segment-robust one.
	ModelStdErr float64
	// Determined says that StdErr is within the parameter's bound
	// (Bound); Why, when it is not, names the test pattern that would
	// determine it.
	Determined bool
	Bound      float64
	Why        string
	// Fields are the configuration fields that SystematicFit.Config
	// changes for this parameter (none when it is not determined, or when
	// the configuration has no field for it: Why then says where to apply
	// it).
	Fields []string
}

// SystematicOptions tune FitSystematic. The zero value means the defaults.
type SystematicOptions struct {
	// SegmentS is how often the dead reckoning is re-anchored, seconds of
	// run (20): each segment's starting pose is a nuisance parameter.
	SegmentS float64
	// HuberK is the Huber loss's constant in standard deviations of the
	// fix's normalised error (1.345).
	HuberK float64
	// SensorsOnly fits only the sensors' mounts and latencies, holding the
	// odometry's geometry and scales as configured.
	SensorsOnly bool

	// keepRegressorBias leaves out correctRegressorNoise (for the tests
	// that measure what it corrects).
	keepRegressorBias bool
}

func (o *SystematicOptions) defaults() {
	if o.SegmentS <= 0 {
		o.SegmentS = 10
	}
	if o.HuberK <= 0 {
		o.HuberK = 1.345
	}
}

// SystematicFit is the outcome of FitSystematic.
type SystematicFit struct {
	// Params are the fitted parameters: the odometry's (each wheel's scale
	// and the wheels' spread; or the IMU's turn scale; or the body step's
	// scales) and each sensor's mount and latency.
	Params []Param
	// Config is the input configuration with every determined parameter
	// that has a field applied.
	Config fusion.Config
	// Fixes is the number of fixes used, Outliers how many of them the
	// fit gave weight zero (gross errors), Segments the number of
	// re-anchored stretches.
	Fixes, Outliers, Segments int
	// Sigma2 is the residual variance factor: the residual sum of squares
	// of the fixes with weight, whitened by their stated covariance and the
	// odometry's drift (not by the robust weights), per degree of freedom;
	// 1 when the fixes' covariances and the odometry's noise are as stated.
	Sigma2 float64
	// Iterations counts the Levenberg-Marquardt iterations over all
	// re-weightings; Converged says the last one met its tolerance.
	Iterations int
	Converged  bool
	// ScaleStates names the fields Config changes to switch on the online
	// scale states (calibration.scale, and calibration.scale_std when the
	// prior must widen): set when a body step's scale lies more than three
	// standard errors from 1, which the configuration has no field for
	// (FitSystematic).
	ScaleStates []string
	// MountStd lists the sensors whose mount standard errors Config
	// carries (sensors[i].mount_std); MountStdNote says why none are
	// written when the state has no room for them.
	MountStd     []int
	MountStdNote string
	// Whiteness says, for each sensor (indexed as Config.Sensors), how its
	// fixes' residuals correlate from one fix to the next once whitened by
	// the covariance the fit weights them with (SensorWhiteness).
	Whiteness []SensorWhiteness
}

// SensorWhiteness is a whiteness test of one sensor's residuals: Lag1 is
// the correlation of each whitened residual component with the same
// component of the sensor's next fix in the segment, over Pairs pairs
// (NaN with none). Whitened by the fit's own covariance (the fixes' noise
// and the drift since the anchor, in each segment's block), the residuals
// are independent when the configuration describes the errors, and then
// Lag1 is about normal with mean 0 and standard deviation 1/sqrt(Pairs)
// (the test for whiteness of innovations, Y. Bar-Shalom, X. R. Li and T.
// Kirubarajan, Estimation with Applications to Tracking and Navigation,
// 2001, sec. 5.4.2). Correlated says Lag1 lies beyond 3 of those standard
// deviations and above 0.1: the sensor's errors repeat from fix to fix
// more than its configuration declares, so the fit counts repeated errors
// as independent evidence and its standard errors are too small (on the
// real-data goal's kind of run, a camera 95% Gauss-Markov configured
// white: the mount's y and heading 1.6 and 1.8 times too small over 12
// runs). The remedy is the workflow's: reckon tune -model, then calibrate
// again on its output, which weights the fixes by the Gauss-Markov model
// it chose.
type SensorWhiteness struct {
	Lag1       float64
	Pairs      int
	Correlated bool
}

// Param returns the fit's parameter of the kind and index, and whether it
// was fitted.
func (f *SystematicFit) Param(k ParamKind, index int) (Param, bool) {
	for _, p := range f.Params {
		if p.Kind == k && p.Index == index {
			return p, true
		}
	}
	return Param{}, false
}

// Bounds on a parameter's standard error for it to count as determined:
// half a percent of a scale, a centimetre of a mount, half a degree of a
// mount's heading, 10 ms of latency. A parameter's prior standard
// deviation (what keeps an unexcited one from making the normal matrix
// singular) is priorFactor times its bound.
const (
	boundScale   = 0.005
	boundMountM  = 0.01
	boundMountRd = 0.5 * math.Pi / 180
	boundLatency = 0.01
	priorFactor  = 100
)

// patterns names, per kind, the test pattern that determines a parameter.
var patterns = map[ParamKind]string{
	WheelScale:       "drive straight runs of several metres, forwards and backwards (and sideways for a lateral wheel), while the sensors see their markers",
	WheelSpread:      "spin in place, several turns each way, while the sensors see their markers",
	IMUTurnScale:     "spin in place, several turns each way, while the sensors see their markers",
	StepForwardScale: "drive straight runs of several metres while the sensors see their markers",
	StepTurnScale:    "spin in place, several turns each way, while the sensors see their markers",
	MountX:           "turn on the spot while the sensor sees its markers (an offset mount turns with the heading)",
	MountY:           "turn on the spot while the sensor sees its markers (an offset mount turns with the heading)",
	MountHeading:     "turn while the sensor sees a landmark, or drive past markers (its heading error turns its view)",
	Latency:          "change speed and turn at different rates while the sensor sees its markers (a late stamp errs by the velocity)",
}

// FitSystematic fits the systematic parameters of a robot's odometry and
// fix sensors to a recorded run: odo are its odometry samples and fixes
// its fixes (each in stamp order or not; they are sorted). The
// configuration must validate; IMU headings of an absolute IMU are not
// used.
//
// # Model
//
// The run's trajectory is dead reckoned from the odometry with the arc
// model (DEVELOPERS.md, "Design: Motion prediction") through the
// parameters: each wheel's travel times its scale, the wheels' positions
// times their spread, the rows solved for the body step by least squares
// weighted by the configured noise rates (exact for three rows). A fix
// stamped t is predicted from the pose at t less the sensor's latency, by
// the measurement models of "Design: Measurement updates" with the mount
// fitted (a fix's own mount moves by the same correction). Its residual
// (angles wrapped) is whitened by the fix's covariance.
//
// Dead reckoning drifts, so the run is cut into segments of SegmentS
// seconds of fixes, each re-anchored: its starting pose is a nuisance
// parameter, free of the others. This is multiple shooting (H. G. Bock
// and K. J. Plitt, IFAC 9th World Congress, 1984) without the continuity
// constraints: systematic errors show within every segment, while the
// random drift, which would dominate a whole run's dead reckoning, is cut
// off at each anchor.
//
// Within a segment the residuals are weighted by their joint covariance
// (generalised least squares): the odometry's drift since the anchor, and
// each fix's own error, white or, for a sensor that declares a
// Gauss-Markov part (fusion.Sensor's CorrelatedFraction and
// CorrelationTimeS), shared between the sensor's fixes dt apart by
// exp(-dt/tau), as the filter models it (segBlock, fixNoise). The
// correlation is read from the configuration: calibrate again after the
// noise fit has chosen it.
//
// # Estimation
//
// Levenberg-Marquardt with Marquardt's diagonal scaling (J. Nocedal and S.
// J. Wright, Numerical Optimization, 2nd ed., 2006, sec. 10.3) minimises
// the weighted sum of squares; the global parameters' Jacobian columns are
// forward differences, the anchors' too (they touch only their segment's
// fixes). Robustness is iteratively reweighted least squares: after each
// converged solve each fix is weighted by Huber's weight min(1, k/d) (P.
// J. Huber, Annals of Mathematical Statistics 35(1), 1964) of its
// normalised error d = sqrt(NIS / s2), s2 the median NIS over the
// chi-square median (a robust scale), and a fix with NIS / s2 beyond the
// chi-square 99.99% quantile gets weight zero (a skipped estimator with
// hard rejection, F. R. Hampel et al., Robust Statistics, 1986, sec.
// 1.4), until the weights settle.
//
// # Standard errors and excitation
//
// The robust weights shape the estimator, not the errors: the fixes kept
// err as stated. So the covariance of the parameters is the sandwich
// N^-1 (J^T C_w^-1 C C_w^-1 J) N^-1 with N = J^T C_w^-1 J, C_w each
// segment's covariance with the weights and C the stated one (the
// covariance of an M-estimator, P. J. Huber, Robust Statistics, 1981, sec.
// 7.6, with the weights held fixed, which overstates it a little for
// normal errors), at the solution with a weak prior (each global
// parameter priorFactor times its bound about its configured value, which
// keeps the matrix invertible when the run does not excite a parameter).
// Also computed is the segment-robust sandwich N^-1 (sum_seg g g^T) N^-1
// with g each segment's score and G/(G-1) for G segments (K.-Y. Liang and
// S. L. Zeger, Biometrika 73(1), 1986), which holds when the stated noise
// is wrong. StdErr is the larger of the two. A parameter whose StdErr
// exceeds its bound is not determined: its configured value is kept and
// Why names the test pattern that would determine it. Not fitted: the
// wheels' common offset and the mounts' common translation move together
// with the reference point and cannot be told apart from it; the wheels'
// rolling directions, whose errors are second order in a run.
func FitSystematic(cfg fusion.Config, odo []fusion.Odometry, fixes []fusion.Fix, opt SystematicOptions) (SystematicFit, error) {
	return FitSystematicFrom(cfg, Samples(odo), fixes, opt)
}

// OdometrySource hands a recording's odometry samples to yield one after
// another, in stamp order or not, until yield returns false or they end;
// it returns why it could not (a read that failed), or nil. A source may
// be called more than once (FitSystematicFrom reads an unsorted one
// twice) and must hand over the same samples each time; it may reuse the
// sample it passes once yield has returned.
type OdometrySource func(yield func(*fusion.Odometry) bool) error

// Samples is the source of the samples odo.
func Samples(odo []fusion.Odometry) OdometrySource {
	return func(yield func(*fusion.Odometry) bool) error {
		for k := range odo {
			if !yield(&odo[k]) {
				break
			}
		}
		return nil
	}
}

// FitSystematicFrom is FitSystematic with the odometry handed over by a
// source (an error of the source's is returned wrapped): the fit keeps
// only its own compact intervals of the samples (32 bytes and the wheels'
// travels, where a fusion.Odometry takes 80 and its counts and heading),
// so that a caller that reads the recording from a file need not hold
// it (reckon calibrate reads the journal again).
func FitSystematicFrom(cfg fusion.Config, odo OdometrySource, fixes []fusion.Fix, opt SystematicOptions) (SystematicFit, error) {
	r, err := fusion.New(cfg)
	if err != nil {
		return SystematicFit{}, fmt.Errorf("%w: %w", ErrSystematic, err)
	}
	// The robot's defaults for what the configuration leaves unset (the
	// speed limit that screens counts, the noise that weights the drift).
	cfg = r.Config()
	opt.defaults()
	m, err := newSysModel(&cfg, odo, fixes, opt)
	if err != nil {
		return SystematicFit{}, err
	}
	s := newSysSolver(m, opt)
	s.solve()
	if !opt.keepRegressorBias {
		s.correctRegressorNoise()
	}
	return s.result(&cfg)
}

// describe fills a parameter's name, unit, bound and pattern.
func describe(cfg *fusion.Config, p *Param) {
	wheel := func(i int) string {
		if n := cfg.Wheels[i].Name; n != "" {
			return fmt.Sprintf("wheels[%d] (%s)", i, n)
		}
		return fmt.Sprintf("wheels[%d]", i)
	}
	sensor := func(i int) string { return fmt.Sprintf("sensors[%d] (%s)", i, cfg.Sensors[i].ID) }
	p.Bound = boundScale
	switch p.Kind {
	case WheelScale:
		p.Name = wheel(p.Index) + " scale"
	case WheelSpread:
		p.Name = "wheel spread (track width factor)"
	case IMUTurnScale:
		p.Name = "IMU turn scale"
	case StepForwardScale:
		p.Name = "body step forward scale"
	case StepTurnScale:
		p.Name = "body step turn scale"
	case MountX:
		p.Name, p.Unit, p.Bound = sensor(p.Index)+" mount.x_m", "m", boundMountM
	case MountY:
		p.Name, p.Unit, p.Bound = sensor(p.Index)+" mount.y_m", "m", boundMountM
	case MountHeading:
		p.Name, p.Unit, p.Bound = sensor(p.Index)+" mount.heading_rad", "rad", boundMountRd
	case Latency:
		p.Name, p.Unit, p.Bound = sensor(p.Index)+" latency", "s", boundLatency
	}
}

// apply writes a determined parameter into c and names the fields it
// changed; counts says whether the run's odometry carried counts. It
// returns where to apply a parameter the configuration has no field for.
func apply(c *fusion.Config, p *Param, counts bool) {
	switch p.Kind {
	case WheelScale:
		if !counts || c.Wheels[p.Index].CountsPerM <= 0 {
			p.Why = fmt.Sprintf("no configuration field: multiply the travel the robot reports for wheels[%d] by %.4f", p.Index, p.Fitted)
			return
		}
		c.Wheels[p.Index].CountsPerM /= p.Fitted
		p.Fields = []string{fmt.Sprintf("wheels[%d].counts_per_m", p.Index)}
	case WheelSpread:
		for i := range c.Wheels {
			c.Wheels[i].XM *= p.Fitted
			c.Wheels[i].YM *= p.Fitted
			p.Fields = append(p.Fields, fmt.Sprintf("wheels[%d].x_m", i), fmt.Sprintf("wheels[%d].y_m", i))
		}
	case IMUTurnScale:
		p.Why = fmt.Sprintf("no configuration field: multiply the IMU's heading changes by %.4f (its scale factor)", p.Fitted)
	case StepForwardScale, StepTurnScale:
		p.Why = fmt.Sprintf("no configuration field: multiply the body steps' %s by %.4f in the controller, or set calibration.scale to estimate it online",
			map[ParamKind]string{StepForwardScale: "forward and left travel", StepTurnScale: "turn"}[p.Kind], p.Fitted)
	case MountX:
		c.Sensors[p.Index].Mount.X = p.Fitted
		p.Fields = []string{fmt.Sprintf("sensors[%d].mount.x_m", p.Index)}
	case MountY:
		c.Sensors[p.Index].Mount.Y = p.Fitted
		p.Fields = []string{fmt.Sprintf("sensors[%d].mount.y_m", p.Index)}
	case MountHeading:
		c.Sensors[p.Index].Mount.Heading = estimator.Wrap(p.Fitted)
		p.Fields = []string{fmt.Sprintf("sensors[%d].mount.heading_rad", p.Index)}
	case Latency:
		ns := int64(math.Round(p.Fitted * 1e9))
		if ns < 0 {
			p.Why = fmt.Sprintf("the sensor stamps its fixes %.0f ms before their capture: its clock is ahead of the robot's; put it on the robot's time base (latency_ns cannot be negative)", -p.Fitted*1e3)
			return
		}
		c.Sensors[p.Index].LatencyNs = ns
		p.Fields = []string{fmt.Sprintf("sensors[%d].latency_ns", p.Index)}
	}
}
