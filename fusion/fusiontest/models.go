package fusiontest

import (
	"math"

	"reckon.example/fusion"
)

// WhiteConfig returns the filter configuration with white-noise
// assumptions: Config, which describes every fix error as white Gaussian
// with the covariance the fix states and the odometry without scale error.
// Under the scenario's Errors it is the wrong model, on purpose; the
// honesty tests show that the Monte Carlo NEES test catches it.
func (s Scenario) WhiteConfig() fusion.Config { return s.Config() }

// TrueModelConfig returns the filter configuration that describes the
// scenario's true error processes with the filter's own models
// (DEVELOPERS.md, "Design: Sensors" and "Design: State"):
//
//   - Gauss-Markov camera errors: the camera's CorrelationTimeS is
//     CameraTauS and its CorrelatedFraction CameraCorrelated, at most
//     MaxCorrelatedFraction (the filter keeps a white part so that its R
//     stays positive definite);
//   - Student-t errors: the Student-t update with CameraTailDOF degrees of
//     freedom. Its scale is the fix's stated covariance, which is the
//     core's with CameraTailCore; without it the fix states the total
//     variance, nu/(nu-2) times the scale, and the filter is conservative;
//   - contamination: Huber's update (k = 1.345) beside the gate, which
//     refuses most contaminated fixes either way;
//   - odometry scale: the calibration's scale states, prior standard
//     deviation 0.1 or the largest injected scale error if larger;
//   - the Commanded layout: the body-step noise per second of its truth
//     (CommandedForwardVarM2PerS and its siblings) instead of the per-metre
//     spread of WhiteConfig, the per-metre terms left negligible
//     (commandedTrueNoise);
//   - a marker map's survey error: LandmarkPositionStdM;
//   - a gyro's rate bias: a random walk of the IMU offset that spreads it
//     over the time constant of the offset's estimate.
//
// Everything else is Config.
func (s Scenario) TrueModelConfig() fusion.Config {
	s.defaults()
	c := s.Config()
	cam := &c.Sensors[0]
	if s.CameraTauS > 0 {
		cam.CorrelationTimeS = s.CameraTauS
		cam.CorrelatedFraction = min(s.CameraCorrelated, MaxCorrelatedFraction)
	}
	switch {
	case s.CameraTailDOF > 0:
		cam.Robust, cam.RobustParameter = fusion.RobustStudentT, float64(s.CameraTailDOF)
	case s.CameraContamination > 0:
		cam.Robust = fusion.RobustHuber
	}
	if s.ForwardScale != 0 || s.TurnScale != 0 {
		c.Calibration.Scale = true
		c.Calibration.ScaleStd = max(0.1, math.Abs(s.ForwardScale), math.Abs(s.TurnScale))
	}
	if s.Layout == Commanded {
		c.Noise = commandedTrueNoise(c.Noise)
	}
	c.IMULatencyNs = s.IMUStampLateNs
	c.LandmarkPositionStdM = s.LandmarkSurveyM
	if s.GyroBiasRadPerS > 0 {
		// A drift of b rad/s spread over the offset's time constant T:
		// q = b^2 T with T = sqrt(R / q), R the pose fixes' heading noise
		// density, which gives b^(4/3) R^(1/3) (calib's OffsetHorizon and
		// its closed-form test).
		r := s.Heading.CameraStdRad * s.Heading.CameraStdRad / s.CameraHz
		c.Noise.IMUOffsetVarRad2PerS += math.Pow(s.GyroBiasRadPerS, 4.0/3) * math.Cbrt(r)
	}
	if s.GyroScale != 0 {
		// A random walk of f^2 per radian covers a scale error f over
		// the turn of about a radian between fixes (DEVELOPERS.md,
		// "Design: Process noise").
		c.Noise.IMUOffsetVarRad2PerRad = s.GyroScale * s.GyroScale
	}
	return c
}

// MaxCorrelatedFraction is the largest correlated fraction TrueModelConfig
// declares: the filter's fraction must stay below 1, and a white part of a
// thousandth of the variance changes the correlation of fixes 0.3 s apart
// from 0.90 to 0.90 (0.999 times).
const MaxCorrelatedFraction = 0.999

// commandedTrueNoise returns n with the Commanded layout's true body-step
// noise: per second, as the simulator draws it. The simulator draws it per
// second of commanded motion, the filter per second elapsed: over the
// greenhouse route's pause of 1 s a lap (of 53 s) the filter adds noise the
// truth has not, about 2% too much variance. The per-metre and per-radian
// terms must be positive; 1e-12 is nothing beside them.
func commandedTrueNoise(n fusion.Noise) fusion.Noise {
	n.StepForwardVarM2PerS = CommandedForwardVarM2PerS
	n.StepLeftVarM2PerS = CommandedLeftVarM2PerS
	n.StepTurnVarRad2PerS = CommandedTurnVarRad2PerS
	n.StepForwardVarM2PerM, n.StepLeftVarM2PerM, n.StepTurnVarRad2PerRad = 1e-12, 1e-12, 1e-12
	return n
}

// WhiteConfig is the scenario's WhiteConfig with the run's starting pose
// (as Config).
func (sm *Sim) WhiteConfig() fusion.Config { return sm.withStart(sm.s.WhiteConfig()) }

// TrueModelConfig is the scenario's TrueModelConfig with the run's
// starting pose (as Config).
func (sm *Sim) TrueModelConfig() fusion.Config { return sm.withStart(sm.s.TrueModelConfig()) }
