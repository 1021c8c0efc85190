package estimator

import (
	"fmt"
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

// eivMeasurement returns a pose fix with no mount near f's pose, or an
// IMU heading near its heading and offset.
func eivMeasurement(f *Filter, rng *rand.Rand, pose bool) Measurement {
	if pose {
		return Measurement{Kind: KindPose, Z: [3]float64{f.st.x[IX] + 0.02*rng.NormFloat64(), f.st.x[IY] + 0.02*rng.NormFloat64(), f.st.x[IHead] + 0.01*rng.NormFloat64()},
			R: [9]float64{4e-4, 1e-5, 0, 1e-5, 4e-4, 0, 0, 0, 1e-4}}
	}
	return Measurement{Kind: KindIMUHeading, Z: [3]float64{Wrap(f.st.x[IHead] + f.st.x[IOffset] + 0.01*rng.NormFloat64())}, R: [9]float64{2e-5}}
}

// TestPredictEIVMatrixForm: PredictReported moves the moments by
// M' = F M F^T - D R G^T, written out by hand in predictEIV; here the same
// products in gonum mat, with F and the step Jacobian from ArcJacobians
// (checked against finite differences in arc_test.go), D = J diag(P[s_f,
// s_t], P[s_f, s_t], P[s_t, s_t]) and G = J diag(s_f, s_f, s_t) for the
// step Jacobian J at the calibrated step (linear algebra, common practice).
// Without a report (rep nil) only F M F^T remains. The moments cover the
// pose and the IMU offset, which a step does not move: F is the pose's
// transition bordered by a 1, and D R G^T lies in the pose block.
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
		F, J := mat.NewDense(EIVDim, EIVDim, nil), mat.NewDense(3, 3, j[:])
		for a := 0; a < 3; a++ {
			for b := 0; b < 3; b++ {
				F.Set(a, b, fx[a*3+b])
			}
		}
		F.Set(IOffset, IOffset, 1)
		m := mat.NewDense(EIVDim, EIVDim, append([]float64(nil), f.st.eiv[:]...))
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
			pose := want.Slice(0, 3, 0, 3).(*mat.Dense)
			pose.Sub(pose, &drg)
		}
		cu := rep
		cu[0] += 1e-6
		q := [MaxStates]float64{}
		if withRep {
			f.PredictReported(u, &cu, &rep, dt, &q)
		} else {
			f.PredictReported(u, &cu, nil, dt, &q)
		}
		closeMats(t, "M after the prediction", mat.NewDense(EIVDim, EIVDim, f.st.eiv[:]), &want, 1e-12)
	}
}

// TestUpdateEIVMatrixForm: a pose fix with no mount (H = [I 0]) and an
// IMU heading (H = [0 0 1 1 0 ...]) on 7 states. The turn scale's
// correction is the Kalman one less the expected pull sum_ab A_ab M_ab,
// A = H_p^T S^-1 H_p over the pose and offset columns, and the moments
// become T M T^T with T = I - K_p H_p, K_p the pose and offset rows of
// the gain K = P H^T S^-1 and S = H P H^T + R: the Kalman gain and
// innovation covariance (Bar-Shalom, Li and Kirubarajan 2001, sec. 5.2)
// in gonum mat. A twin filter with the moments at zero gives the
// correction without the pull.
func TestUpdateEIVMatrixForm(t *testing.T) {
	rng := rand.New(rand.NewPCG(43, 44))
	for k := 0; k < 40; k++ {
		f := eivFilter(t, rng)
		twin := *f
		twin.st.eiv = EIVMoments{}
		ts, n := f.Layout().TurnScale(), f.st.n
		m := eivMeasurement(f, rng, k%2 == 0)
		var h *mat.Dense
		if k%2 == 0 {
			h = mat.NewDense(3, n, nil)
			for a := 0; a < 3; a++ {
				h.Set(a, a, 1)
			}
		} else {
			h = mat.NewDense(1, n, nil)
			h.Set(0, IHead, 1)
			h.Set(0, IOffset, 1)
		}
		d, _ := h.Dims()
		p := mat.NewDense(n, n, nil)
		for a := 0; a < n; a++ {
			for b := 0; b < n; b++ {
				p.Set(a, b, f.st.p[a*stride+b])
			}
		}
		r := mat.NewDense(d, d, nil)
		for a := 0; a < d; a++ {
			for b := 0; b < d; b++ {
				r.Set(a, b, m.R[a*3+b])
			}
		}
		var hp, s, sInv, gain mat.Dense
		hp.Mul(h, p)
		s.Mul(&hp, h.T())
		s.Add(&s, r)
		if err := sInv.Inverse(&s); err != nil {
			t.Fatal(err)
		}
		gain.Mul(hp.T(), &sInv)
		hpo := h.Slice(0, d, 0, EIVDim)
		var hs, a mat.Dense
		hs.Mul(hpo.T(), &sInv)
		a.Mul(&hs, hpo)
		M := mat.NewDense(EIVDim, EIVDim, append([]float64(nil), f.st.eiv[:]...))
		var pull float64
		for i := 0; i < EIVDim; i++ {
			for j := 0; j < EIVDim; j++ {
				pull += a.At(i, j) * M.At(i, j)
			}
		}
		var kh, tm, want mat.Dense
		kh.Mul(gain.Slice(0, EIVDim, 0, d), hpo)
		tMat := mat.NewDense(EIVDim, EIVDim, nil)
		for i := 0; i < EIVDim; i++ {
			tMat.Set(i, i, 1)
		}
		tMat.Sub(tMat, &kh)
		tm.Mul(tMat, M)
		want.Mul(&tm, tMat.T())

		if _, err := f.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		if _, err := twin.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		if got := twin.st.x[ts] - f.st.x[ts]; math.Abs(got-pull) > 1e-9*math.Abs(pull)+1e-15 {
			t.Errorf("case %d (%v): the turn scale's pull %.6g, want %.6g", k, m.Kind, got, pull)
		}
		closeMats(t, fmt.Sprintf("case %d (%v): M after the update", k, m.Kind), mat.NewDense(EIVDim, EIVDim, f.st.eiv[:]), &want, 1e-9)
		if twin.st.eiv != (EIVMoments{}) {
			t.Errorf("case %d: zero moments became %v", k, twin.st.eiv)
		}
	}
}

// TestInitOffsetEIV: the IMU offset initialised from a heading z is z - th,
// so its covariance with the turn scale is minus the heading's and its
// error minus the heading's (the reading's own error is independent of
// both): the moments' offset row and column become minus the heading's,
// the offset's diagonal the heading's, and the pose block stays (linear
// covariance propagation, common practice).
func TestInitOffsetEIV(t *testing.T) {
	rng := rand.New(rand.NewPCG(45, 46))
	f := eivFilter(t, rng)
	before := f.st.eiv
	if err := f.InitOffset(0.3, 1e-4); err != nil {
		t.Fatal(err)
	}
	m := &f.st.eiv
	for a := 0; a < EIVDim; a++ {
		for b := 0; b < EIVDim; b++ {
			want := before[a*EIVDim+b]
			switch {
			case a == IOffset && b == IOffset:
				want = before[IHead*EIVDim+IHead]
			case a == IOffset:
				want = -before[IHead*EIVDim+b]
			case b == IOffset:
				want = -before[a*EIVDim+IHead]
			}
			if m[a*EIVDim+b] != want {
				t.Errorf("M[%d][%d] = %g, want %g", a, b, m[a*EIVDim+b], want)
			}
		}
	}
}

// TestResetKeepsOffsetEIV: Reset sets the pose alone. The offset keeps its
// covariance with the turn scale (c's offset component, P[imu_offset,
// s_t]) and its error, so its own moment E[c_off e_off] stays as it was;
// the pose's c is zero after the reset and its new error (the reseed's or
// the fix's) is independent of the reported turns, so every moment with a
// pose index is zero (the definition M = E[c e^T], DEVELOPERS.md "Design:
// State"; expectation of independent variables, common practice). A move
// recovery that keeps the IMU offset (fusion's keepOffset) goes on with
// that moment; zeroing it dropped the pull the offset's part of an IMU
// heading's update carries.
func TestResetKeepsOffsetEIV(t *testing.T) {
	rng := rand.New(rand.NewPCG(47, 48))
	f := eivFilter(t, rng)
	ts := f.Layout().TurnScale()
	before, pOffTs := f.st.eiv, f.st.p[IOffset*stride+ts]
	c := [9]float64{1e-2, 0, 0, 0, 1e-2, 0, 0, 0, 1e-3}
	if err := f.Reset(Pose{1, 2, 0.3}, &c); err != nil {
		t.Fatal(err)
	}
	if got := f.st.p[IOffset*stride+ts]; got != pOffTs {
		t.Fatalf("P[imu_offset, s_t] = %g after the reset, was %g", got, pOffTs)
	}
	for a := 0; a < EIVDim; a++ {
		for b := 0; b < EIVDim; b++ {
			want := 0.0
			if a == IOffset && b == IOffset {
				want = before[a*EIVDim+b]
			}
			if got := f.st.eiv[a*EIVDim+b]; got != want {
				t.Errorf("M[%d][%d] = %g after the reset, want %g", a, b, got, want)
			}
		}
	}
}

// considerFilter is eivFilter with the consider parameter's standard
// deviation 0.5 and a consider column psi of the compensation, its part
// 0.25 psi psi^T in P.
func considerFilter(t *testing.T, rng *rand.Rand) *Filter {
	t.Helper()
	f := eivFilter(t, rng)
	f.layout.eivVar = 0.25
	n := f.st.n
	for i := 0; i < n; i++ {
		f.st.eivc[i] = 0.05 * rng.NormFloat64()
	}
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			f.st.p[i*stride+j] += f.layout.eivVar * f.st.eivc[i] * f.st.eivc[j]
		}
	}
	return f
}

// augmented returns the covariance of the state and the consider
// parameter d: [[P, s^2 psi], [s^2 psi^T, s^2]], s^2 the layout's
// eivVar.
func augmented(f *Filter) *mat.Dense {
	n, v := f.st.n, f.layout.eivVar
	a := mat.NewDense(n+1, n+1, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			a.Set(i, j, f.st.p[i*stride+j])
		}
		a.Set(i, n, v*f.st.eivc[i])
		a.Set(n, i, v*f.st.eivc[i])
	}
	a.Set(n, n, v)
	return a
}

// TestUpdateEIVConsider: the compensation's consider column through an
// update (a pose fix and an IMU heading on 7 states). The true pull is
// (1 + d) times the one taken out, d the consider parameter of variance
// s^2 (LayoutSpec.NoiseRatioStd squared), so the update's error is e' = (I - K H) e + K w + d pull
// u_s: the augmented state (x, d) moves by A = [[I - K H, pull u_s], [0,
// 1]] with gain [K; 0], and its covariance by the Joseph form A P A^T +
// [K; 0] R [K; 0]^T (Bar-Shalom, Li and Kirubarajan 2001, eq.
// 5.2.3-18; a consider parameter's gain row is zero, S. F. Schmidt 1966,
// from memory), in gonum mat. The filter's P must be its state block and
// s^2 psi its column of d. The gain is the filter's, checked
// against the Kalman one in TestUpdateEIVMatrixForm; the pull is the
// difference to a twin without moments, checked there too.
func TestUpdateEIVConsider(t *testing.T) {
	rng := rand.New(rand.NewPCG(49, 50))
	for k := 0; k < 20; k++ {
		f := considerFilter(t, rng)
		twin := *f
		twin.st.eiv = EIVMoments{}
		ts, n := f.Layout().TurnScale(), f.st.n
		m := eivMeasurement(f, rng, k%2 == 0)
		before := augmented(f)
		if _, err := f.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		if _, err := twin.Update(&m, NoGate()); err != nil {
			t.Fatal(err)
		}
		pull := twin.st.x[ts] - f.st.x[ts]
		if pull == 0 {
			t.Fatalf("case %d: no pull", k)
		}
		d := m.Kind.Dim()
		h := mat.NewDense(d, n+1, nil)
		for j := 0; j < d; j++ {
			for i := 0; i < n; i++ {
				h.Set(j, i, f.h[j*stride+i])
			}
		}
		gain := mat.NewDense(n+1, d, nil)
		for i := 0; i < n; i++ {
			for j := 0; j < d; j++ {
				gain.Set(i, j, f.k[i*3+j])
			}
		}
		r := mat.NewDense(d, d, nil)
		for a := 0; a < d; a++ {
			for b := 0; b < d; b++ {
				r.Set(a, b, m.R[a*3+b])
			}
		}
		a := mat.NewDense(n+1, n+1, nil)
		a.Mul(gain, h)
		a.Scale(-1, a)
		for i := 0; i <= n; i++ {
			a.Set(i, i, a.At(i, i)+1)
		}
		a.Set(ts, n, pull)
		var ap, want, kr, krk mat.Dense
		ap.Mul(a, before)
		want.Mul(&ap, a.T())
		kr.Mul(gain, r)
		krk.Mul(&kr, gain.T())
		want.Add(&want, &krk)
		closeMats(t, fmt.Sprintf("case %d (%v): augmented covariance after the update", k, m.Kind), augmented(f), &want, 1e-9)
	}
}

// TestPredictEIVConsider: a prediction moves the consider column as a
// column of P, psi' = F psi (F from Transition, checked against finite
// differences in filter_test.go), whatever the report; the augmented
// covariance's d block is untouched (the parameter is constant), so P
// keeps s^2 psi' psi'^T with the rest.
func TestPredictEIVConsider(t *testing.T) {
	rng := rand.New(rand.NewPCG(51, 52))
	for k := 0; k < 10; k++ {
		f := considerFilter(t, rng)
		n := f.st.n
		u := Step{0.004 * rng.Float64(), 0.001 * rng.NormFloat64(), 0.01 * rng.NormFloat64()}
		var tr [MaxStates * MaxStates]float64
		from := f.st
		f.Transition(&tr, &from, u, 0.005)
		want := make([]float64, n)
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				want[i] += tr[i*stride+j] * from.eivc[j]
			}
		}
		cu := [9]float64{1e-6, 0, 0, 0, 1e-6, 0, 0, 0, 1e-6}
		var q [MaxStates]float64
		f.PredictReported(u, &cu, &cu, 0.005, &q)
		for i := 0; i < n; i++ {
			if math.Abs(f.st.eivc[i]-want[i]) > 1e-12 {
				t.Errorf("case %d: psi[%d] = %.12g, want %.12g", k, i, f.st.eivc[i], want[i])
			}
		}
	}
}
