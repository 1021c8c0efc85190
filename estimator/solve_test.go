package estimator

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// TestSolveStepMatchesGonum compares SolveStep with weighted least squares
// solved independently by gonum mat (QR of the whitened system, and the
// covariance (A^T W A)^-1 when the weights are the inverse variances).
func TestSolveStepMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(4, 4))
	for trial := 0; trial < 30; trial++ {
		nrows := 3 + trial%4
		rows := make([]Row, nrows)
		a := mat.NewDense(nrows, 3, nil)
		z := mat.NewVecDense(nrows, nil)
		for i := range rows {
			coef := WheelCoef(rng.NormFloat64()*0.2, rng.NormFloat64()*0.2, rng.Float64()*2*math.Pi)
			v := rng.NormFloat64() * 0.01
			vr := 1e-6 * (1 + rng.Float64())
			rows[i] = Row{Coef: coef, Value: v, Var: vr}
			w := 1 / math.Sqrt(vr)
			for j := 0; j < 3; j++ {
				a.Set(i, j, coef[j]*w)
			}
			z.SetVec(i, v*w)
		}
		var sol StepSolution
		if err := SolveStep(rows, 0, &sol); err != nil {
			t.Fatal(err)
		}
		var u mat.VecDense
		if err := u.SolveVec(a, z); err != nil {
			t.Fatal(err)
		}
		got := []float64{sol.Step.ForwardM, sol.Step.LeftM, sol.Step.TurnRad}
		for j := 0; j < 3; j++ {
			if math.Abs(got[j]-u.AtVec(j)) > 1e-9*math.Max(1, math.Abs(u.AtVec(j))) {
				t.Errorf("trial %d: step[%d] = %g, gonum %g", trial, j, got[j], u.AtVec(j))
			}
		}
		var ata, inv mat.Dense
		ata.Mul(a.T(), a)
		if err := inv.Inverse(&ata); err != nil {
			t.Fatal(err)
		}
		compareMat(t, "step covariance", float64(trial), sol.Cov[:], &inv, 1e-8)
		var res mat.VecDense
		res.MulVec(a, &u)
		res.SubVec(z, &res)
		chi := mat.Dot(&res, &res)
		if math.Abs(chi-sol.ChiSquare) > 1e-8*math.Max(1, chi) {
			t.Errorf("trial %d: chi-square %g, gonum %g", trial, sol.ChiSquare, chi)
		}
		if sol.DOF != nrows-3 {
			t.Errorf("DOF %d, want %d", sol.DOF, nrows-3)
		}
	}
}

// TestSolveStepStandingStill: wheels whose variance scales with their travel
// give an exactly zero step covariance when nothing moves.
func TestSolveStepStandingStill(t *testing.T) {
	rows := []Row{
		{Coef: WheelCoef(0, 0.15, 0)},
		{Coef: WheelCoef(0, -0.15, 0)},
		{Coef: WheelCoef(-0.1, 0, math.Pi/2)},
	}
	var sol StepSolution
	if err := SolveStep(rows, 1e-12, &sol); err != nil {
		t.Fatal(err)
	}
	if sol.Step != (Step{}) || sol.Cov != [9]float64{} {
		t.Errorf("standing still: step %+v covariance %v, want zeros", sol.Step, sol.Cov)
	}
}

// TestSolveStepSlip: four wheels, one slipping by 5 mm with 0.1 mm noise,
// give a residual chi-square far above the 99.9% quantile for one degree of
// freedom (10.83, NIST/SEMATECH e-Handbook 1.3.6.7.4, from memory).
func TestSolveStepSlip(t *testing.T) {
	coefs := [][3]float64{WheelCoef(0.1, 0.15, 0), WheelCoef(0.1, -0.15, 0), WheelCoef(-0.1, 0, math.Pi/2), WheelCoef(0.12, 0, math.Pi/2)}
	u := Step{0.02, 0.001, 0.01}
	rows := make([]Row, len(coefs))
	for i, c := range coefs {
		rows[i] = Row{Coef: c, Value: c[0]*u.ForwardM + c[1]*u.LeftM + c[2]*u.TurnRad, Var: 1e-8}
	}
	var sol StepSolution
	if err := SolveStep(rows, 0, &sol); err != nil {
		t.Fatal(err)
	}
	if sol.ChiSquare > 1e-12 {
		t.Errorf("consistent rows: chi-square %g, want ~0", sol.ChiSquare)
	}
	rows[0].Value += 0.005
	if err := SolveStep(rows, 0, &sol); err != nil {
		t.Fatal(err)
	}
	if sol.ChiSquare < 10.83 {
		t.Errorf("slipping wheel: chi-square %g, want above 10.83", sol.ChiSquare)
	}
}

func TestSolveStepUnobservable(t *testing.T) {
	// Two parallel wheels cannot see sideways travel.
	rows := []Row{{Coef: WheelCoef(0, 0.15, 0), Var: 1e-6}, {Coef: WheelCoef(0, -0.15, 0), Var: 1e-6}, {Coef: WheelCoef(0.2, 0.15, 0), Var: 1e-6}}
	var sol StepSolution
	if err := SolveStep(rows, 1e-12, &sol); !errors.Is(err, ErrUnobservable) {
		t.Errorf("parallel wheels only: err %v, want ErrUnobservable", err)
	}
	rows[2] = Row{Coef: LeftCoef(), Var: 1e-6}
	if err := SolveStep(rows, 1e-12, &sol); err != nil {
		t.Errorf("with the no-side-slip row: %v", err)
	}
	rows[0].Value = math.NaN()
	if err := SolveStep(rows, 1e-12, &sol); !errors.Is(err, ErrNotFinite) {
		t.Errorf("NaN travel: err %v, want ErrNotFinite", err)
	}
}
