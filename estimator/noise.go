package estimator

import "math"

// StepRates are the noise rates of a body step that the robot computed
// itself: per metre travelled (m^2/m), per radian turned (rad^2/rad) and
// per second elapsed (m^2/s, rad^2/s; commanded-velocity odometry). Every
// term adds over sub-intervals (DEVELOPERS.md, "Design: Process noise").
type StepRates struct {
	ForwardVarM2PerM, LeftVarM2PerM, TurnVarRad2PerRad float64
	ForwardVarM2PerS, LeftVarM2PerS, TurnVarRad2PerS   float64
}

// StepNoise writes into dst the 3x3 row-major covariance of a body step s
// over dtS seconds: diag(f d + f' dt, l d + l' dt, t |turn| + t' dt) with d
// the step's length, the unprimed rates per metre or radian and the primed
// ones per second.
func StepNoise(dst *[9]float64, s Step, dtS float64, r *StepRates) {
	d := math.Hypot(s.ForwardM, s.LeftM)
	*dst = [9]float64{
		r.ForwardVarM2PerM*d + r.ForwardVarM2PerS*dtS, 0, 0,
		0, r.LeftVarM2PerM*d + r.LeftVarM2PerS*dtS, 0,
		0, 0, r.TurnVarRad2PerRad*math.Abs(s.TurnRad) + r.TurnVarRad2PerS*dtS,
	}
}

// TimeNoise writes into dst the time-driven process noise that Predict adds
// to the diagonal of a filter of layout l over dtS seconds: a heading
// random walk of headingVarPerS (rad^2/s) and, where the layout has the
// IMU offset, an offset random walk of offsetVarPerS (rad^2/s). Every other
// entry is zero: position noise comes with the step.
func TimeNoise(dst *[MaxStates]float64, l *Layout, dtS, headingVarPerS, offsetVarPerS float64) {
	*dst = [MaxStates]float64{IHead: headingVarPerS * dtS}
	if l.offset >= 0 {
		dst[l.offset] = offsetVarPerS * dtS
	}
}

// Sandwich writes J R J^T into dst for 3x3 row-major J and R: the
// covariance of J x for x of covariance R. dst may not alias j or r.
//
// Written out, with the products and sums in the order of the loops
// over i and k it replaces (the same bits; TestSandwichWrittenOut): the
// loops' index arithmetic and bounds checks were 480 instructions a call,
// 4% of the service's own at robot rates (BenchmarkRatesPath under
// callgrind, session 22), for 27 products and 18 sums.
func Sandwich(dst, j, r *[9]float64) {
	jr00 := j[0]*r[0] + j[1]*r[3] + j[2]*r[6]
	jr01 := j[0]*r[1] + j[1]*r[4] + j[2]*r[7]
	jr02 := j[0]*r[2] + j[1]*r[5] + j[2]*r[8]
	jr10 := j[3]*r[0] + j[4]*r[3] + j[5]*r[6]
	jr11 := j[3]*r[1] + j[4]*r[4] + j[5]*r[7]
	jr12 := j[3]*r[2] + j[4]*r[5] + j[5]*r[8]
	jr20 := j[6]*r[0] + j[7]*r[3] + j[8]*r[6]
	jr21 := j[6]*r[1] + j[7]*r[4] + j[8]*r[7]
	jr22 := j[6]*r[2] + j[7]*r[5] + j[8]*r[8]
	dst[0] = jr00*j[0] + jr01*j[1] + jr02*j[2]
	dst[1] = jr00*j[3] + jr01*j[4] + jr02*j[5]
	dst[2] = jr00*j[6] + jr01*j[7] + jr02*j[8]
	dst[3] = jr10*j[0] + jr11*j[1] + jr12*j[2]
	dst[4] = jr10*j[3] + jr11*j[4] + jr12*j[5]
	dst[5] = jr10*j[6] + jr11*j[7] + jr12*j[8]
	dst[6] = jr20*j[0] + jr21*j[1] + jr22*j[2]
	dst[7] = jr20*j[3] + jr21*j[4] + jr22*j[5]
	dst[8] = jr20*j[6] + jr21*j[7] + jr22*j[8]
}

// Mahalanobis returns d^T S^-1 d for a 3-vector d and a 3x3 row-major
// symmetric S, by Cholesky; false if S is not positive definite.
func Mahalanobis(d *[3]float64, s *[9]float64) (float64, bool) {
	var l [9]float64
	if !cholesky(s[:], l[:], 3, 3) {
		return 0, false
	}
	var y [3]float64
	cholForward(l[:], 3, 3, d[:], y[:])
	return y[0]*y[0] + y[1]*y[1] + y[2]*y[2], true
}

// PoseNEES returns the normalised estimation error squared of a pose
// estimate est with 3x3 row-major covariance cov against the true pose:
// e^T cov^-1 e with e = truth - est, heading wrapped (Bar-Shalom, Li and
// Kirubarajan, 2001, section 5.4.2). It returns ErrNotPositiveDefinite if
// cov is not positive definite.
func PoseNEES(est Pose, cov *[9]float64, truth Pose) (float64, error) {
	e := [3]float64{truth.X - est.X, truth.Y - est.Y, Wrap(truth.Heading - est.Heading)}
	q, ok := Mahalanobis(&e, cov)
	if !ok {
		return 0, ErrNotPositiveDefinite
	}
	return q, nil
}
