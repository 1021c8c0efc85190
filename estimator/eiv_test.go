package estimator

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// eivFilter returns a 7-state filter (offset, scales, rate bias) with
// errors-in-variables moments of the size wheel odometry leaves them.
func eivFilter(t *testing.T, rng *rand.Rand) *Filter {
	t.Helper()
	f := randomFilter(t, rng, 7)
	for i := range f.st.eiv {
		f.st.eiv[i] = 1e-5 * rng.NormFloat64()
	}
	return f
}

// closeMats fails unless got and want agree to tol relative to want's
// largest entry.
func closeMats(t *testing.T, what string, got, want *mat.Dense, tol float64) {
	t.Helper()
	scale := mat.Norm(want, math.Inf(1))
	var d mat.Dense
	d.Sub(got, want)
	if e := mat.Norm(&d, math.Inf(1)); e > tol*scale {
		t.Errorf("%s: differs by %.3g (scale %.3g)\ngot  %v\nwant %v", what, e, scale, mat.Formatted(got), mat.Formatted(want))
	}
}

// TestPredictEIVMatrixForm: PredictReported moves the moments by
// M' = F M F^T - D R G^T, written out by hand in predictEIV; here the same
// products in gonum mat, with F and the step Jacobian from ArcJacobians
// (checked against finite differences in arc_test.go), D = J diag(P[s_f,
// s_t], P[s_f, s_t], P[s_t, s_t]) and G = J diag(s_f, s_f, s_t) for the
// step Jacobian J at the calibrated step (linear algebra, common practice).
// Without a report (rep nil) only F M F^T remains.
func TestPredictEIVMatrixForm(t *testing.T) {
	rng := rand.New(rand.NewPCG(41, 42))
	for k := 0; k < 20; k++ {
		f := eivFilter(t, rng)
		l := f.Layout()
		fs, ts, rb := l.ForwardScale(), l.TurnScale(), l.RateBias()
		u := Step{0.004 * rng.Float64(), 0.001 * rng.NormFloat64(), 0.01 * rng.NormFloat64()}
		dt := 0.005
		var rep [9]float64
		a := mat.NewDense(3, 3, nil)
		for i := 0; i < 9; i++ {
			a.Set(i/3, i%3, 1e-4*rng.NormFloat64())
		}
		var r mat.Dense
		r.Mul(a, a.T())
		for i := 0; i < 9; i++ {
			rep[i] = r.At(i/3, i%3)
		}
		sf, st, br := f.st.x[fs], f.st.x[ts], f.st.x[rb]
		tu := Step{sf * u.ForwardM, sf * u.LeftM, st*u.TurnRad + br*dt}
		var fx, j [9]float64
		ArcJacobians(f.Pose(), tu, &fx, &j)
		F, J := mat.NewDense(3, 3, fx[:]), mat.NewDense(3, 3, j[:])
		m := mat.NewDense(3, 3, append([]float64(nil), f.st.eiv[:]...))
		pfs, pts := f.st.p[fs*stride+ts], f.st.p[ts*stride+ts]
		var want, fm, d, g, dr mat.Dense
		fm.Mul(F, m)
		want.Mul(&fm, F.T())
		withRep := k%2 == 0
		if withRep {
			d.Mul(J, mat.NewDiagDense(3, []float64{pfs, pfs, pts}))
			g.Mul(J, mat.NewDiagDense(3, []float64{sf, sf, st}))
			dr.Mul(&d, &r)
			var drg mat.Dense
			drg.Mul(&dr, g.T())
			want.Sub(&want, &drg)
		}
		cu := rep
		cu[0] += 1e-6
		q := [MaxStates]float64{}
		if withRep {
			f.PredictReported(u, &cu, &rep, dt, &q)
		} else {
			f.PredictReported(u, &cu, nil, dt, &q)
		}
		closeMats(t, "M after the prediction", mat.NewDense(3, 3, f.st.eiv[:]), &want, 1e-12)
	}
}

// TestUpdateEIVMatrixForm: a pose fix with no mount (H = [I 0]) on 7
// states. The turn scale's correction is the Kalman one less the expected
// pull sum_ab (S^-1)_ab M_ab (A = H^T S^-1 H = S^-1 here), and the moments
// become (I - K_p) M (I - K_p)^T with K_p = P_pp S^-1 and S = P_pp + R:
// the Kalman gain and innovation covariance (Bar-Shalom, Li and Kirubarajan
// 2001, sec. 5.2) in gonum mat. A twin filter with the moments at zero
// gives the correction without the pull.
func TestUpdateEIVMatrixForm(t *testing.T) {
	rng := rand.New(rand.NewPCG(43, 44))
	for k := 0; k < 20; k++ {
		f := eivFilter(t, rng)
		twin := *f
		twin.st.eiv = [9]float64{}
		ts := f.Layout().TurnScale()
		m := Measurement{Kind: KindPose, Z: [3]float64{f.st.x[IX] + 0.02*rng.NormFloat64(), f.st.x[IY] + 0.02*rng.NormFloat64(), f.st.x[IHead] + 0.01*rng.NormFloat64()},
			R: [9]float64{4e-4, 1e-5, 0, 1e-5, 4e-4, 0, 0, 0, 1e-4}}
		ppp := mat.NewDense(3, 3, nil)
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				ppp.Set(a, b, f.st.p[a*stride+b])
			}
		}
		var s, sInv mat.Dense
		s.Add(ppp, mat.NewDense(3, 3, m.R[:]))
		if err := sInv.Inverse(&s); err != nil {
			t.Fatal(err)
		}
		M := mat.NewDense(3, 3, append([]float64(nil), f.st.eiv[:]...))
		var pull float64
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				pull += sInv.At(a, b) * M.At(a, b)
			}
		}
		var kp, tm, want mat.Dense
		kp.Mul(ppp, &sInv)
		tMat := mat.NewDense(3, 3, []float64{1, 0, 0, 0, 1, 0, 0, 0, 1})
		tMat.Sub(tMat, &kp)
		tm.Mul(tMat, M)
		want.Mul(&tm, tMat.T())

		if _, err := f.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		if _, err := twin.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		if got := twin.st.x[ts] - f.st.x[ts]; math.Abs(got-pull) > 1e-9*math.Abs(pull)+1e-15 {
			t.Errorf("case %d: the turn scale's pull %.6g, want %.6g", k, got, pull)
		}
		closeMats(t, "M after the update", mat.NewDense(3, 3, f.st.eiv[:]), &want, 1e-9)
		if twin.st.eiv != [9]float64{} {
			t.Errorf("case %d: zero moments became %v", k, twin.st.eiv)
		}
	}
}
