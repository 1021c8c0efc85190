package fusiontest

import (
	"fmt"
	"math"
	"math/rand/v2"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// Errors are the error processes of real sensors that a white-noise model
// does not describe: camera errors correlated in time or heavy-tailed, and
// odometry with a scale bias. The zero value turns every one off. Their
// draws come from a random source of their own, so that switching them on
// leaves the scenario's other draws unchanged.
type Errors struct {
	// CameraTauS, if positive, makes each component of the camera's error
	// (x, y and heading of a pose fix; range and bearing of a landmark fix)
	// first-order Gauss-Markov with this time constant in seconds (1 to 3 s
	// on real cameras). One process per component serves every marker.
	CameraTauS float64
	// CameraCorrelated is the fraction of each component's error variance
	// in the Gauss-Markov part (default 1 when CameraTauS is set); the rest
	// is white. Fixes dt apart then correlate CameraCorrelated *
	// exp(-dt/CameraTauS): 0.9 for 0.3 s apart with 1 and 2.85 s.
	CameraCorrelated float64
	// CameraTailDOF, if set (3 to 5 on real cameras; more than 2), draws the
	// white part of the camera's errors from a Student-t with this many
	// degrees of freedom, scaled to the stated standard deviation.
	CameraTailDOF int
	// CameraTailCore makes the stated standard deviation the Student-t's
	// scale, the spread of its core (what a robust fit of real errors
	// finds), instead of its total standard deviation: the total variance
	// is then CameraTailDOF/(CameraTailDOF-2) times the stated one.
	CameraTailCore bool
	// CameraContamination is the fraction of camera fixes whose white part
	// has CameraContaminationScale (default 5) times the stated standard
	// deviation: a contaminated normal.
	CameraContamination, CameraContaminationScale float64
	// ForwardScale and TurnScale are odometry scale errors: the reported
	// forward and left travel is the true one times 1+ForwardScale, the
	// reported turn the true one times 1+TurnScale (3% to 15% on real
	// robots). With wheels, each wheel reports the travel of that scaled
	// step, as if its counts per metre and the wheel base were off.
	ForwardScale, TurnScale float64
	// WheelScales, if set (one entry per wheel of the layout), are each
	// wheel's own scale errors: wheel i reports 1+WheelScales[i] times its
	// travel (a worn wheel, a wrong counts per metre), on top of
	// ForwardScale and TurnScale.
	WheelScales []float64
	// CameraStampLateNs stamps every camera fix this long after its
	// capture (a clock offset, or a latency the configuration does not
	// declare); CameraStampAtArrival stamps each at its arrival instead,
	// the capture plus its varying delay (a vision process that stamps
	// when it sends). Neither draws.
	CameraStampLateNs    int64
	CameraStampAtArrival bool
	// GyroScale is the IMU's scale error: it reads 1+GyroScale times every
	// turn of the robot, so that its heading's zero moves by GyroScale
	// times each turn (1% to 3% for an uncalibrated MEMS gyro, from
	// memory).
	GyroScale float64
	// IMUStampLateNs stamps every absolute IMU heading this long after it
	// was read (a serial IMU stamped on arrival: 5 to 50 ms).
	IMUStampLateNs int64
	// LandmarkSurveyM is the survey error of the marker map: each marker
	// stands off its mapped position by a normal draw of this standard
	// deviation in each axis, the same all run (markers placed by tape
	// measure: 1 to 5 cm). Each marker's draw is its own, whatever the
	// order the camera sees them in.
	LandmarkSurveyM float64
	// GyroBiasRadPerS is the standard deviation of a gyro's rate bias left
	// after its zeroing at start: each run draws one bias from a normal of
	// this deviation, and the IMU's heading zero drifts at that rate all
	// run (3e-4 rad/s, 60 degrees an hour, for an inexpensive MEMS gyro
	// whose temperature changes; from memory).
	GyroBiasRadPerS float64
}

// camera reports whether any camera error process is on.
func (e *Errors) camera() bool {
	return e.CameraTauS > 0 || e.CameraTailDOF > 0 || e.CameraContamination > 0
}

// defaults fills the fractions and scales left zero, and panics on values
// no scenario can mean.
func (e *Errors) defaults() {
	if e.CameraTauS > 0 && e.CameraCorrelated == 0 {
		e.CameraCorrelated = 1
	}
	if e.CameraContamination > 0 && e.CameraContaminationScale == 0 {
		e.CameraContaminationScale = 5
	}
	switch {
	case e.CameraTauS < 0 || e.CameraCorrelated < 0 || e.CameraCorrelated > 1:
		panic(fmt.Sprintf("fusiontest: camera time constant %g s, correlated fraction %g", e.CameraTauS, e.CameraCorrelated))
	case e.CameraTailDOF < 0 || e.CameraTailDOF == 1 || e.CameraTailDOF == 2:
		panic(fmt.Sprintf("fusiontest: a Student-t with %d degrees of freedom has no variance", e.CameraTailDOF))
	case e.CameraContamination < 0 || e.CameraContamination > 1:
		panic(fmt.Sprintf("fusiontest: contamination fraction %g", e.CameraContamination))
	}
}

// The Commanded layout's truth departs from the commanded step by white
// noise in velocity: these variances per second of commanded motion, in the
// body frame (a small differential drive without encoders: about 1 cm and
// 0.02 rad per square root of second).
const (
	CommandedForwardVarM2PerS = 1e-4
	CommandedLeftVarM2PerS    = 2.5e-5
	CommandedTurnVarRad2PerS  = 4e-4
)

// errorState is the state of the error processes of one run.
type errorState struct {
	rng          *rand.Rand
	gm           [3]float64 // Gauss-Markov parts in units of each component's standard deviation
	gmT          int64      // stamp of gm
	gmReady      bool
	contaminated bool    // the current fix's white part is scaled up
	tScale       float64 // the current fix's Student-t scale
}

func newErrorState(seed uint64) errorState {
	return errorState{rng: rand.New(rand.NewPCG(seed^0x5851f42d4c957f2d, 0x14057b7ef767814f))}
}

// startFix advances the Gauss-Markov parts to the fix's stamp t and decides
// whether the fix is contaminated. The exact discretisation of
// db = -b/tau dt + dW keeps the stationary variance: b' = phi b +
// sqrt(1-phi^2) w, phi = exp(-dt/tau) (Gelb, Applied Optimal Estimation,
// 1974, sec. 4.5, first-order Markov process).
func (es *errorState) startFix(s *Scenario, t int64) {
	if !s.Errors.camera() {
		return
	}
	if s.CameraTauS > 0 {
		sc := math.Sqrt(s.CameraCorrelated)
		if !es.gmReady {
			for k := range es.gm {
				es.gm[k] = sc * es.rng.NormFloat64()
			}
			es.gmReady = true
		} else {
			phi := math.Exp(-float64(t-es.gmT) * 1e-9 / s.CameraTauS)
			for k := range es.gm {
				es.gm[k] = phi*es.gm[k] + math.Sqrt(1-phi*phi)*sc*es.rng.NormFloat64()
			}
		}
		es.gmT = t
	}
	es.contaminated = s.CameraContamination > 0 && es.rng.Float64() < s.CameraContamination
	if s.CameraTailDOF > 0 {
		es.tScale = es.studentTScale(s.CameraTailDOF, s.CameraTailCore)
	}
}

// studentTScale draws the scale of one fix's Student-t errors with nu
// degrees of freedom: 1/sqrt(chi2_nu / nu), times sqrt((nu-2)/nu) for unit
// variance unless core. A normal variate times it is a Student-t variate of
// variance nu/(nu-2) (common practice). One scale serves every component of
// a fix, so that the fix's error is a multivariate Student-t, each
// component a Student-t: a bad detection spoils the whole fix, and this is
// the model of the filter's Student-t update (DEVELOPERS.md, "Design:
// Sensors"), whose weight scales the fix's whole covariance.
func (es *errorState) studentTScale(nu int, core bool) float64 {
	var chi2 float64
	for i := 0; i < nu; i++ {
		g := es.rng.NormFloat64()
		chi2 += g * g
	}
	sc := 1 / math.Sqrt(chi2/float64(nu))
	if core {
		return sc
	}
	return sc * math.Sqrt(float64(nu-2)/float64(nu))
}

// camNoise returns the camera error of component k (after startFix), whose
// stated standard deviation is std. Without camera error processes it is
// the white Gaussian error of the simulator's own source, as always.
func (sm *Sim) camNoise(k int, std float64) float64 {
	s := &sm.s
	if !s.Errors.camera() {
		return sm.gauss(std)
	}
	es := &sm.errs
	var white float64
	white = es.rng.NormFloat64()
	if s.CameraTailDOF > 0 {
		white *= es.tScale
	}
	if es.contaminated {
		white *= s.CameraContaminationScale
	}
	return std * (es.gm[k] + math.Sqrt(1-s.CameraCorrelated)*white)
}

// commandedMotion moves the truth of the Commanded layout away from the
// command by white velocity noise over the seconds of commanded motion
// since the last event.
func (sm *Sim) commandedMotion() {
	m := sm.movingS
	sm.movingS = 0
	if m == 0 {
		return
	}
	r := sm.errs.rng
	d := estimator.Step{
		ForwardM: r.NormFloat64() * math.Sqrt(CommandedForwardVarM2PerS*m),
		LeftM:    r.NormFloat64() * math.Sqrt(CommandedLeftVarM2PerS*m),
		TurnRad:  r.NormFloat64() * math.Sqrt(CommandedTurnVarRad2PerS*m),
	}
	sm.truth = estimator.Advance(sm.truth, d)
}

// commandedWhiteNoise returns n with the body-step noise per metre and per
// radian that matches the Commanded layout's noise per second over one lap
// of the route: the same total variance, spread by distance and angle
// instead of time. The cart drives at speed whenever it moves, so forward
// and left match exactly; the turn noise, which the truth has on straights
// too, does not.
func commandedWhiteNoise(n fusion.Noise, speed float64) fusion.Noise {
	var movingS, turnRad float64
	for _, sg := range greenhouseRoute(speed, false) {
		d := float64(sg.durNs) * 1e-9
		if sg.v != 0 || sg.u != 0 || sg.w != 0 {
			movingS += d
		}
		turnRad += math.Abs(sg.w) * d
	}
	n.StepForwardVarM2PerM = CommandedForwardVarM2PerS / speed
	n.StepLeftVarM2PerM = CommandedLeftVarM2PerS / speed
	n.StepTurnVarRad2PerRad = CommandedTurnVarRad2PerS * movingS / turnRad
	return n
}
