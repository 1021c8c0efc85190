package calib

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// TestArrowSolveMatchesDense: the block-arrow normal matrix solved by
// eliminating the anchors (the Schur complement) gives the solution of the
// same dense system solved by gonum's Cholesky (mat), undamped and with
// Marquardt's damping of the diagonal, to 1e-9 relative: random segments'
// symmetric positive definite contributions, 4 globals and 6 segments.
func TestArrowSolveMatchesDense(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 7))
	const ng, segs = 4, 6
	p := ng + 3*segs
	an := newArrowNormal(ng, segs)
	dense := mat.NewSymDense(p, nil)
	for k := range segs {
		c := ng + 3
		j := mat.NewDense(c+2, c, nil)
		for i := range c + 2 {
			for l := range c {
				j.Set(i, l, rng.NormFloat64())
			}
		}
		var m mat.Dense
		m.Mul(j.T(), j) // positive definite with probability 1
		v := mat.NewVecDense(c, nil)
		for i := range c {
			v.SetVec(i, rng.NormFloat64())
		}
		an.addBlock(k, &m, v)
		idx := func(x int) int {
			if x < ng {
				return x
			}
			return ng + 3*k + x - ng
		}
		for x := range c {
			for y := x; y < c; y++ {
				dense.SetSym(idx(x), idx(y), dense.At(idx(x), idx(y))+m.At(x, y))
			}
		}
	}
	rhs := mat.NewVecDense(p, nil)
	rg := make([]float64, ng)
	ra := make([][3]float64, segs)
	for i := range p {
		v := rng.NormFloat64()
		rhs.SetVec(i, v)
		if i < ng {
			rg[i] = v
		} else {
			ra[(i-ng)/3][(i-ng)%3] = v
		}
	}
	for _, lambda := range []float64{0, 0.1} {
		s, ok := an.factor(lambda)
		if !ok {
			t.Fatalf("lambda %v: not factored", lambda)
		}
		gotG, gotA, ok := s.solve(rg, ra)
		if !ok {
			t.Fatalf("lambda %v: not solved", lambda)
		}
		damped := mat.NewSymDense(p, nil)
		damped.CopySym(dense)
		for i := range p {
			damped.SetSym(i, i, dense.At(i, i)*(1+lambda))
		}
		var ch mat.Cholesky
		if !ch.Factorize(damped) {
			t.Fatalf("lambda %v: the dense system is not positive definite", lambda)
		}
		var want mat.VecDense
		if err := ch.SolveVecTo(&want, rhs); err != nil {
			t.Fatal(err)
		}
		for i := range p {
			got := 0.0
			if i < ng {
				got = gotG[i]
			} else {
				got = gotA[(i-ng)/3][(i-ng)%3]
			}
			if w := want.AtVec(i); math.Abs(got-w) > 1e-9*math.Max(1, math.Abs(w)) {
				t.Errorf("lambda %v: unknown %d is %v, gonum's dense solve %v", lambda, i, got, w)
			}
		}
	}
}
