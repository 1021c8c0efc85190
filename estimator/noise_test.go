package estimator

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// TestStepNoiseAdds: the step noise of two halves of a straight or turning
// step adds up to the noise of the whole (noise rates per metre, per radian
// and per second), the property that makes the estimate independent of the
// sampling rate.
func TestStepNoiseAdds(t *testing.T) {
	s := Step{ForwardM: 0.3, LeftM: -0.1, TurnRad: 0.4}
	for _, r := range []StepRates{
		{ForwardVarM2PerM: 1e-4, LeftVarM2PerM: 2e-4, TurnVarRad2PerRad: 3e-4},
		{ForwardVarM2PerM: 1e-4, LeftVarM2PerM: 2e-4, TurnVarRad2PerRad: 3e-4, ForwardVarM2PerS: 4e-5, LeftVarM2PerS: 5e-5, TurnVarRad2PerS: 6e-5},
	} {
		var whole, half [9]float64
		StepNoise(&whole, s, 0.8, &r)
		StepNoise(&half, s.Scale(0.5), 0.4, &r)
		for i := range whole {
			if math.Abs(whole[i]-2*half[i]) > 1e-18 {
				t.Errorf("entry %d: whole %g, two halves %g", i, whole[i], 2*half[i])
			}
		}
		if want := 1e-4*math.Hypot(0.3, 0.1) + r.ForwardVarM2PerS*0.8; math.Abs(whole[0]-want) > 1e-18 {
			t.Errorf("forward variance %g, want %g", whole[0], want)
		}
		if want := 3e-4*0.4 + r.TurnVarRad2PerS*0.8; math.Abs(whole[8]-want) > 1e-18 {
			t.Errorf("turn variance %g, want %g", whole[8], want)
		}
	}
	var q [MaxStates]float64
	l3, l7 := testLayout(3), testLayout(7)
	TimeNoise(&q, &l3, 2, 1e-7, 5e-7)
	if q != [MaxStates]float64{IHead: 2e-7} {
		t.Errorf("3 states: %v", q)
	}
	TimeNoise(&q, &l7, 2, 1e-7, 5e-7)
	if q != [MaxStates]float64{IHead: 2e-7, IOffset: 1e-6} {
		t.Errorf("7 states: %v", q)
	}
}

// TestSandwichAndMahalanobisMatchGonum checks J R J^T and d^T S^-1 d against
// gonum mat on random matrices (tolerance 1e-12 relative).
func TestSandwichAndMahalanobisMatchGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	for k := 0; k < 50; k++ {
		var j, a [9]float64
		for i := range j {
			j[i], a[i] = rng.NormFloat64(), rng.NormFloat64()
		}
		// r = a a^T + I is symmetric positive definite.
		var r [9]float64
		ra := mat.NewDense(3, 3, a[:])
		var rr mat.Dense
		rr.Mul(ra, ra.T())
		for i := 0; i < 3; i++ {
			for c := 0; c < 3; c++ {
				r[i*3+c] = rr.At(i, c)
			}
			r[i*3+i]++
		}
		var got [9]float64
		Sandwich(&got, &j, &r)
		jm, rm := mat.NewDense(3, 3, j[:]), mat.NewDense(3, 3, r[:])
		var want mat.Dense
		want.Product(jm, rm, jm.T())
		for i := 0; i < 9; i++ {
			if w := want.At(i/3, i%3); math.Abs(got[i]-w) > 1e-12*math.Max(1, math.Abs(w)) {
				t.Fatalf("Sandwich entry %d: %g, gonum %g", i, got[i], w)
			}
		}
		d := [3]float64{rng.NormFloat64(), rng.NormFloat64(), rng.NormFloat64()}
		m, ok := Mahalanobis(&d, &r)
		var x mat.VecDense
		if err := x.SolveVec(rm, mat.NewVecDense(3, d[:])); err != nil || !ok {
			t.Fatalf("solve: %v, ok %v", err, ok)
		}
		if w := mat.Dot(mat.NewVecDense(3, d[:]), &x); math.Abs(m-w) > 1e-12*math.Max(1, w) {
			t.Fatalf("Mahalanobis %g, gonum %g", m, w)
		}
	}
	bad := [9]float64{1, 2, 0, 2, 1, 0, 0, 0, 1}
	if _, err := PoseNEES(Pose{}, &bad, Pose{X: 1}); err != ErrNotPositiveDefinite {
		t.Errorf("indefinite covariance: %v", err)
	}
}

// TestSandwichWrittenOut: Sandwich, written out, gives the bits of the
// loops it replaced (the products and sums in the same order), so that
// journals written before it replay to the same outputs. The loops are
// kept here as the reference; NaN and infinities are among the inputs.
func TestSandwichWrittenOut(t *testing.T) {
	loops := func(dst, j, r *[9]float64) {
		var jr [9]float64
		for i := 0; i < 3; i++ {
			for k := 0; k < 3; k++ {
				jr[i*3+k] = j[i*3+0]*r[0*3+k] + j[i*3+1]*r[1*3+k] + j[i*3+2]*r[2*3+k]
			}
		}
		for i := 0; i < 3; i++ {
			for k := 0; k < 3; k++ {
				dst[i*3+k] = jr[i*3+0]*j[k*3+0] + jr[i*3+1]*j[k*3+1] + jr[i*3+2]*j[k*3+2]
			}
		}
	}
	rng := rand.New(rand.NewPCG(22, 1))
	special := []float64{0, math.Copysign(0, -1), 1e-310, -1e300, math.Inf(1), math.NaN()}
	for n := 0; n < 20000; n++ {
		var j, r, got, want [9]float64
		for i := range j {
			j[i], r[i] = rng.NormFloat64()*math.Exp(rng.NormFloat64()*5), rng.NormFloat64()*math.Exp(rng.NormFloat64()*5)
			if n%50 == 0 && rng.IntN(9) == 0 {
				j[i] = special[rng.IntN(len(special))]
			}
		}
		Sandwich(&got, &j, &r)
		loops(&want, &j, &r)
		for i := range got {
			if math.Float64bits(got[i]) != math.Float64bits(want[i]) && !(math.IsNaN(got[i]) && math.IsNaN(want[i])) {
				t.Fatalf("entry %d of J R J^T for J %v, R %v: %v, the loops %v", i, j, r, got[i], want[i])
			}
		}
	}
}
