package estimator

import "math"

// Row is one linear reading of a body step u = (forward, left, turn):
// Coef . u = Value, with variance Var of Value. A wheel, an IMU rotation or a
// no-side-slip constraint each give one row (DEVELOPERS.md, "Design: Motion prediction").
type Row struct {
	Coef  [3]float64
	Value float64
	Var   float64
}

// WheelCoef returns the row coefficients of an encoder wheel mounted at body
// position (xM, yM) rolling along body direction dirRad:
//
//	travel = cos(phi)*forward + sin(phi)*left + (x*sin(phi) - y*cos(phi))*turn
func WheelCoef(xM, yM, dirRad float64) [3]float64 {
	s, c := math.Sincos(dirRad)
	return [3]float64{c, s, xM*s - yM*c}
}

// TurnCoef returns the row coefficients of a source that reads the turn
// directly (an IMU's heading difference over the interval).
func TurnCoef() [3]float64 { return [3]float64{0, 0, 1} }

// LeftCoef returns the row coefficients of a no-side-slip constraint:
// leftward travel is zero.
func LeftCoef() [3]float64 { return [3]float64{0, 1, 0} }

// StepSolution is the weighted least-squares body step of a set of rows.
type StepSolution struct {
	Step Step
	// Cov is the 3x3 row-major covariance of (forward, left, turn).
	Cov [9]float64
	// ChiSquare is the weighted residual sum of squares; with DOF > 0 it is
	// chi-square distributed with DOF degrees of freedom when the rows agree.
	ChiSquare float64
	// DOF is the number of rows less three.
	DOF int
}

// SolveStep solves rows for the body step by weighted least squares and
// writes the result into sol.
//
// The weights are 1/(Var + weightFloor); the covariance is propagated from
// the rows' own variances (the sandwich form M diag(Var) M^T with M the
// estimator's gain), so a row with zero variance (a wheel that did not move,
// whose noise scales with its travel) gives zero uncertainty rather than a
// singular system. weightFloor is a small variance (m^2) that keeps the
// weights finite.
//
// Reference: the weighted least-squares estimator and its covariance,
// Bar-Shalom, Li and Kirubarajan (2001), section 3.4.
func SolveStep(rows []Row, weightFloor float64, sol *StepSolution) error {
	if len(rows) < 3 {
		return ErrUnobservable
	}
	var n [9]float64 // normal matrix A^T W A
	var r [3]float64 // A^T W z
	for i := range rows {
		row := &rows[i]
		if !finite(row.Value) || !finite(row.Var) || row.Var < 0 {
			return ErrNotFinite
		}
		w := 1 / (row.Var + weightFloor)
		for a := 0; a < 3; a++ {
			wa := w * row.Coef[a]
			r[a] += wa * row.Value
			for b := 0; b < 3; b++ {
				n[a*3+b] += wa * row.Coef[b]
			}
		}
	}
	var l [9]float64
	if !cholesky(n[:], l[:], 3, 3) {
		return ErrUnobservable
	}
	var u [3]float64
	cholSolveVec(l[:], 3, 3, r[:], u[:])
	sol.Step = Step{u[0], u[1], u[2]}
	sol.Cov = [9]float64{}
	sol.ChiSquare = 0
	sol.DOF = len(rows) - 3
	for i := range rows {
		row := &rows[i]
		w := 1 / (row.Var + weightFloor)
		res := row.Value - (row.Coef[0]*u[0] + row.Coef[1]*u[1] + row.Coef[2]*u[2])
		sol.ChiSquare += w * res * res
		if row.Var == 0 {
			continue
		}
		// m = N^-1 a w: this row's column of the gain.
		var m [3]float64
		cholSolveVec(l[:], 3, 3, row.Coef[:], m[:])
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				sol.Cov[a*3+b] += row.Var * w * w * m[a] * m[b]
			}
		}
	}
	return nil
}

func finite(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
