package fusion

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// TestInvertSPD: relocation's written-out inverse of a fix's 1 to 3 row
// weight against gonum's mat.Dense.Inverse (the reference), on random
// symmetric positive definite matrices, to their rounding (the condition
// number times the unit roundoff); a singular, nearly singular or
// indefinite one is refused where gonum's refuses it
// (mat.ConditionTolerance), and NaN is refused.
func TestInvertSPD(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 27))
	for trial := range 3000 {
		d := 1 + trial%3
		b := mat.NewDense(d, d, nil)
		for i := range d {
			for j := range d {
				b.Set(i, j, rng.NormFloat64()*math.Pow(10, float64(rng.IntN(7)-3)))
			}
		}
		var a mat.Dense
		a.Mul(b, b.T())
		for i := range d {
			a.Set(i, i, a.At(i, i)+1e-6)
		}
		var arr [9]float64
		for i := range d {
			for j := range d {
				arr[i*3+j] = a.At(i, j)
			}
		}
		got, ok := invertSPD(&arr, d)
		var want mat.Dense
		err := want.Inverse(&a)
		if _, cond := err.(mat.Condition); err != nil && !cond {
			if ok {
				t.Fatalf("trial %d: gonum refuses %v (%v), invertSPD does not", trial, mat.Formatted(&a), err)
			}
			continue
		}
		if err != nil {
			// Near gonum's limit its estimate and the exact number may
			// fall either side; refusing is what both do beyond it.
			continue
		}
		if !ok {
			t.Fatalf("trial %d: invertSPD refuses %v, which gonum inverts", trial, mat.Formatted(&a))
		}
		// Both carry rounding errors of about the condition number
		// times the unit roundoff relative to the inverse's norm
		// (Golub and Van Loan, sec. 2.6.2).
		tol := 1e-14 * mat.Cond(&a, 1) * mat.Norm(&want, 1)
		for i := range d {
			for j := range d {
				w := want.At(i, j)
				if math.Abs(got[i*3+j]-w) > tol {
					t.Fatalf("trial %d, d %d: inverse[%d][%d] %g, gonum %g (condition %g, tolerance %g)", trial, d, i, j, got[i*3+j], w, mat.Cond(&a, 1), tol)
				}
			}
		}
	}
	sing := [9]float64{1, 2, 0, 2, 4, 0, 0, 0, 1}
	if _, ok := invertSPD(&sing, 3); ok {
		t.Error("a singular 3 x 3 taken")
	}
	near := [9]float64{1, 1, 0, 1, 1 + 1e-17, 0}
	if _, ok := invertSPD(&near, 2); ok {
		t.Error("a 2 x 2 past gonum's condition limit taken")
	}
	indef := [9]float64{1, 2, 0, 2, 1, 0, 0, 0, 1}
	if _, ok := invertSPD(&indef, 3); ok {
		t.Error("an indefinite 3 x 3 taken")
	}
	nan := [9]float64{math.NaN()}
	if _, ok := invertSPD(&nan, 1); ok {
		t.Error("NaN taken")
	}
}

// TestSolveNormal: the Gauss-Newton step of relocation against gonum's
// Cholesky solve (the reference it replaced), and an indefinite matrix,
// whose Cholesky factorisation fails, refused.
func TestSolveNormal(t *testing.T) {
	rng := rand.New(rand.NewPCG(8, 27))
	for trial := range 1000 {
		b := mat.NewDense(3, 3, nil)
		for i := range 3 {
			for j := range 3 {
				b.Set(i, j, rng.NormFloat64())
			}
		}
		info := mat.NewSymDense(3, nil)
		info.SymOuterK(1, b)
		for i := range 3 {
			info.SetSym(i, i, info.At(i, i)+0.01)
		}
		grad := mat.NewVecDense(3, []float64{rng.NormFloat64(), rng.NormFloat64(), rng.NormFloat64()})
		var ch mat.Cholesky
		if !ch.Factorize(info) {
			t.Fatalf("trial %d: not positive definite", trial)
		}
		var want mat.VecDense
		if err := ch.SolveVecTo(&want, grad); err != nil {
			t.Fatal(err)
		}
		got, ok := solveNormal(info, grad)
		if !ok {
			t.Fatalf("trial %d: refused", trial)
		}
		for i := range 3 {
			if math.Abs(got[i]-want.AtVec(i)) > 1e-8*(1+math.Abs(want.AtVec(i))) {
				t.Fatalf("trial %d: step[%d] %g, gonum %g", trial, i, got[i], want.AtVec(i))
			}
		}
	}
	indef := mat.NewSymDense(3, []float64{1, 2, 0, 2, 1, 0, 0, 0, 1})
	if _, ok := solveNormal(indef, mat.NewVecDense(3, []float64{1, 1, 1})); ok {
		t.Error("an indefinite matrix taken")
	}
}
