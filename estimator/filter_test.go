package estimator

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/mat"
)

// testLayout returns the layout of the test filters of size n: 3 (pose),
// 4 (with the IMU offset), 7 (with odometry scales and a heading-rate bias),
// 9 (the IMU offset, a mount block and a landmark block) or 12 (and bias
// blocks of a pose sensor and a landmark sensor).
func testLayout(n int) Layout {
	switch n {
	case 3:
		return MustLayout(LayoutSpec{})
	case 4:
		return MustLayout(LayoutSpec{IMUOffset: true})
	case 7:
		return MustLayout(LayoutSpec{IMUOffset: true, OdometryScale: true, RateBias: true})
	case 9:
		return MustLayout(LayoutSpec{IMUOffset: true, Biases: []BiasSpec{
			{Dim: 3, Mount: true, Cov: [9]float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 1e-3}},
			{Dim: 2, Landmark: true, Cov: [9]float64{9e-4, 0, 0, 0, 9e-4}},
		}})
	case 12:
		return MustLayout(LayoutSpec{IMUOffset: true, OdometryScale: true, RateBias: true, Biases: []BiasSpec{
			{Dim: 3, TauS: 1.5, Cov: [9]float64{4e-4, 1e-5, 0, 1e-5, 4e-4, 0, 0, 0, 1e-4}},
			{Dim: 2, TauS: 2, Cov: [9]float64{2e-4, 0, 0, 0, 5e-5}},
		}})
	}
	panic("no test layout of that size")
}

// testSizes are the state sizes the tests run.
var testSizes = []int{3, 4, 7, 12}

// randomFilter returns a filter of size n (testLayout) with a random mean
// (scales near 1) and a random well-conditioned covariance.
func randomFilter(t testing.TB, rng *rand.Rand, n int) *Filter {
	l := testLayout(n)
	x := make([]float64, n)
	for i := range x {
		x[i] = rng.NormFloat64()
	}
	x[IHead] = Wrap(x[IHead] * 3)
	if l.ForwardScale() >= 0 {
		x[l.ForwardScale()] = 1 + 0.05*rng.NormFloat64()
		x[l.TurnScale()] = 1 + 0.05*rng.NormFloat64()
		x[l.RateBias()] *= 0.01
	}
	for k := 0; k < l.Biases(); k++ {
		at, dim := l.Bias(k)
		for i := at; i < at+dim; i++ {
			x[i] *= 0.02
		}
	}
	f, err := NewFilter(&l, x, randomCov(rng, n, 0.1, 0.01))
	if err != nil {
		t.Fatal(err)
	}
	return f
}

// randomCov returns a random well-conditioned n x n covariance, row-major:
// A A^T for A of standard normal entries times s, plus floor on the
// diagonal.
func randomCov(rng *rand.Rand, n int, s, floor float64) []float64 {
	a := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			a.Set(i, j, s*rng.NormFloat64())
		}
	}
	var p mat.Dense
	p.Mul(a, a.T())
	for i := 0; i < n; i++ {
		p.Set(i, i, p.At(i, i)+floor)
	}
	return p.RawMatrix().Data
}

func stateDense(s *State) *mat.Dense {
	d := mat.NewDense(s.n, s.n, nil)
	for i := 0; i < s.n; i++ {
		for j := 0; j < s.n; j++ {
			d.Set(i, j, s.p[i*stride+j])
		}
	}
	return d
}

func flatP(s *State) []float64 {
	out := make([]float64, 0, s.n*s.n)
	for i := 0; i < s.n; i++ {
		out = append(out, s.p[i*stride:i*stride+s.n]...)
	}
	return out
}

// TestPredictMatchesGonum: the fixed-size covariance propagation equals
// F P F^T + G cu G^T + diag(q) + Q_bias formed with gonum mat, F and G
// built here from ArcJacobians at the calibrated step u' = (s_f a, s_f b,
// s_t dth + b_r dt): the pose rows get Fu [a b 0]^T in the forward-scale
// column, Fu[:,2] dth in the turn-scale column and Fu[:,2] dt in the rate
// bias column; G = Fu diag(s_f, s_f, s_t); a bias block decays by
// phi = exp(-dt/tau) and gains (1 - phi^2) C.
func TestPredictMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 5))
	for _, n := range testSizes {
		for trial := 0; trial < 20; trial++ {
			f := randomFilter(t, rng, n)
			l := f.Layout()
			before := f.State()
			u := Step{rng.NormFloat64() * 0.1, rng.NormFloat64() * 0.02, rng.NormFloat64() * 0.3}
			const dt = 0.04
			cu := [9]float64{1e-4, 1e-5, 0, 1e-5, 2e-4, 3e-6, 0, 3e-6, 5e-4}
			var q [MaxStates]float64
			for i := 2; i < n; i++ {
				q[i] = 1e-6 * float64(i)
			}
			f.Predict(u, &cu, dt, &q)
			sf, st, br := 1.0, 1.0, 0.0
			if l.ForwardScale() >= 0 {
				sf, st, br = before.x[l.ForwardScale()], before.x[l.TurnScale()], before.x[l.RateBias()]
			}
			ut := Step{sf * u.ForwardM, sf * u.LeftM, st*u.TurnRad + br*dt}
			var fx, fu [9]float64
			ArcJacobians(before.Pose(), ut, &fx, &fu)
			F := eye(n)
			G := mat.NewDense(n, 3, nil)
			for i := 0; i < 3; i++ {
				for j := 0; j < 3; j++ {
					F.Set(i, j, fx[i*3+j])
				}
				G.Set(i, 0, fu[i*3+0]*sf)
				G.Set(i, 1, fu[i*3+1]*sf)
				G.Set(i, 2, fu[i*3+2]*st)
				if l.ForwardScale() >= 0 {
					F.Set(i, l.ForwardScale(), fu[i*3+0]*u.ForwardM+fu[i*3+1]*u.LeftM)
					F.Set(i, l.TurnScale(), fu[i*3+2]*u.TurnRad)
					F.Set(i, l.RateBias(), fu[i*3+2]*dt)
				}
			}
			Q := mat.NewDense(n, n, nil)
			for k := 0; k < l.Biases(); k++ {
				at, dim := l.Bias(k)
				b := l.blocks[k]
				phi := math.Exp(-dt / b.TauS)
				for i := 0; i < dim; i++ {
					F.Set(at+i, at+i, phi)
					for j := 0; j < dim; j++ {
						Q.Set(at+i, at+j, (1-phi*phi)*b.Cov[i*3+j])
					}
				}
			}
			var fp, want, gc, gcg mat.Dense
			fp.Mul(F, stateDense(&before))
			want.Mul(&fp, F.T())
			gc.Mul(G, mat.NewDense(3, 3, cu[:]))
			gcg.Mul(&gc, G.T())
			want.Add(&want, &gcg)
			want.Add(&want, Q)
			for i := 0; i < n; i++ {
				want.Set(i, i, want.At(i, i)+q[i])
			}
			after := f.State()
			compareMat(t, fmt.Sprintf("predicted covariance, %d states", n), float64(trial), flatP(&after), &want, 1e-12)
			wp := Advance(before.Pose(), ut)
			if d := poseDist(wp, after.Pose()); d > 0 {
				t.Errorf("predicted mean %+v, want %+v", after.Pose(), wp)
			}
			var tr [MaxStates * MaxStates]float64
			f.Transition(&tr, &before, u, dt)
			got := make([]float64, 0, n*n)
			for i := 0; i < n; i++ {
				got = append(got, tr[i*stride:i*stride+n]...)
			}
			compareMat(t, fmt.Sprintf("transition, %d states", n), float64(trial), got, F, 1e-15)
		}
	}
}

// TestTransitionMatchesFiniteDifferences: the Jacobian of the predicted
// mean with respect to the whole state (Filter.Transition), including the
// scale, rate-bias and bias columns, equals central finite differences of
// Predict's mean (gonum diff/fd).
func TestTransitionMatchesFiniteDifferences(t *testing.T) {
	rng := rand.New(rand.NewPCG(15, 15))
	for _, n := range testSizes {
		for trial := 0; trial < 10; trial++ {
			f := randomFilter(t, rng, n)
			st := f.State()
			u := Step{rng.NormFloat64() * 0.2, rng.NormFloat64() * 0.05, rng.NormFloat64() * 0.5}
			if trial == 0 {
				u.TurnRad = 1e-6 // the series branch of the arc factors
			}
			const dt = 0.1
			var zero [9]float64
			var q [MaxStates]float64
			x0 := st.x[:n]
			g := f.layout
			mean := func(dst, x []float64) {
				s := NewState(n, st.angles, x, flatP(&st))
				h := &Filter{layout: g, st: s}
				h.Predict(u, &zero, dt, &q)
				copy(dst, h.st.x[:n])
			}
			num := meanJacobian(&st, x0, mean)
			var tr [MaxStates * MaxStates]float64
			f.Transition(&tr, &st, u, dt)
			got := make([]float64, 0, n*n)
			for i := 0; i < n; i++ {
				got = append(got, tr[i*stride:i*stride+n]...)
			}
			compareMat(t, fmt.Sprintf("transition of %d states", n), float64(trial), got, num, 1e-6)
		}
	}
}

// meanJacobian returns the central differences (gonum diff/fd) at x0 of
// mean, a map of the states of st's layout, its angular outputs unwrapped
// around their value at x0.
func meanJacobian(st *State, x0 []float64, mean func(dst, x []float64)) *mat.Dense {
	n := len(x0)
	ref := make([]float64, n)
	mean(ref, x0)
	num := mat.NewDense(n, n, nil)
	fd.Jacobian(num, func(dst, x []float64) {
		mean(dst, x)
		for i := range dst {
			if st.isAngle(i) {
				dst[i] = ref[i] + Wrap(dst[i]-ref[i])
			}
		}
	}, x0, &fd.JacobianSettings{Formula: fd.Central})
	return num
}

// measurementCases returns one measurement of every kind with a mount and a
// plausible covariance.
func measurementCases(rng *rand.Rand) []Measurement {
	var out []Measurement
	for _, k := range Kinds() {
		m := Measurement{Kind: k, Mount: Pose{0.12, -0.05, 0.3}, LandmarkX: 3, LandmarkY: -2}
		d := k.Dim()
		for i := 0; i < d; i++ {
			m.Z[i] = rng.NormFloat64() * 0.1
			m.R[i*3+i] = 0.01 + 0.01*rng.Float64()
		}
		if d > 1 {
			m.R[1], m.R[3] = 0.002, 0.002
		}
		out = append(out, m)
	}
	return out
}

// biased returns m with the bias states of the 12-state test layout: the
// pose-sensor block (states 7 to 9) for pose, position and heading fixes,
// the landmark block (10, 11: range, bearing) for landmark fixes, and a
// robust model by kind, so that every option meets every model.
func biased(m Measurement) Measurement {
	switch m.Kind {
	case KindPose:
		m.Bias = [3]int{7, 8, 9}
		m.Robust = Robust{Kind: RobustHuber, Param: 1.345}
	case KindPosition:
		m.Bias = [3]int{7, 8}
		m.Robust = Robust{Kind: RobustStudentT, Param: 4}
	case KindHeading:
		m.Bias = [3]int{9}
	case KindRangeBearing:
		m.Bias = [3]int{10, 11}
		m.Robust = Robust{Kind: RobustStudentT, Param: 3}
	case KindRange:
		m.Bias = [3]int{10}
		m.Robust = Robust{Kind: RobustHuber, Param: 1}
	case KindBearing:
		m.Bias = [3]int{11}
	}
	return m
}

// conformanceCase is a measurement on a filter of a given size.
type conformanceCase struct {
	n int
	m Measurement
}

// conformanceCases returns every kind on 4 and 7 states, with bias
// states and robust models on 12, and every sensor's kind with mount error
// states (4 to 6) on 7.
func conformanceCases(rng *rand.Rand) []conformanceCase {
	var out []conformanceCase
	for _, n := range []int{4, 7, 12} {
		for _, m := range measurementCases(rng) {
			if n == 12 {
				m = biased(m)
			}
			out = append(out, conformanceCase{n, m})
		}
	}
	for _, m := range measurementCases(rng) {
		if m.Kind != KindIMUHeading {
			m.MountError = 4
			out = append(out, conformanceCase{7, m})
		}
		if m.Kind == KindRangeBearing || m.Kind == KindRange || m.Kind == KindBearing {
			m.MountError, m.LandmarkError = 4, 7
			out = append(out, conformanceCase{9, m})
		}
	}
	return out
}

// TestMeasurementConformance is the suite every measurement model passes:
// its Jacobian equals central finite differences of its h(x) (gonum
// diff/fd), and after an update the covariance is symmetric, positive
// definite and no larger than before (trace).
func TestMeasurementConformance(t *testing.T) {
	rng := rand.New(rand.NewPCG(6, 6))
	for _, c := range conformanceCases(rng) {
		m, n := c.m, c.n
		name := fmt.Sprintf("%s/%d", m.Kind, n)
		if m.MountError > 0 {
			name += "/mount-error"
		}
		if m.LandmarkError > 0 {
			name += "/landmark-error"
		}
		t.Run(name, func(t *testing.T) {
			for trial := 0; trial < 10; trial++ {
				f := randomFilter(t, rng, n)
				st := f.State()
				x := st.x[:n]
				z0, H, err := m.Predicted(x)
				if err != nil {
					t.Fatal(err)
				}
				d := m.Kind.Dim()
				num := mat.NewDense(d, n, nil)
				fd.Jacobian(num, func(dst, v []float64) {
					z, _, _ := m.Predicted(v)
					for i := range dst {
						dst[i] = z0[i] + Wrap(z[i]-z0[i])
						if !m.Kind.IsAngle(i) {
							dst[i] = z[i]
						}
					}
				}, x, &fd.JacobianSettings{Formula: fd.Central})
				compareMat(t, "measurement Jacobian", float64(trial), H, num, 1e-6)

				// Measure near the prediction so the update is ordinary.
				mm := m
				for i := 0; i < d; i++ {
					mm.Z[i] = z0[i] + 0.05*rng.NormFloat64()
				}
				trBefore := mat.Trace(stateDense(&st))
				out, err := f.Update(&mm, NoGate())
				if err != nil {
					t.Fatal(err)
				}
				if out.Dim != d || out.NIS < 0 || math.IsNaN(out.NIS) || !(out.Weight > 0 && out.Weight <= 1) {
					t.Errorf("outcome %+v", out)
				}
				after := f.State()
				if err := CheckCovariance(flatP(&after), n); err != nil {
					t.Errorf("covariance after update: %v", err)
				}
				if tr := mat.Trace(stateDense(&after)); tr > trBefore {
					t.Errorf("trace grew from %g to %g", trBefore, tr)
				}
			}
		})
	}
}

// TestUpdateMatchesGonum: the Joseph-form update equals the textbook EKF
// update formed with gonum mat: S = H P H^T + R, K = P H^T S^-1,
// P' = (I-KH) P (I-KH)^T + K R K^T, NIS = v^T S^-1 v (Bar-Shalom, Li and
// Kirubarajan, 2001, sections 5.2 and 5.4); with a robust model R becomes
// R / w in S, K and P' (w of the raw NIS), and the gain rows of the bias
// and mount states (consider states, Schmidt 1966) are zero; a landmark
// block's are not. With UpdateRepeat (half the fixes) the extra noise
// joins R / w in S, K and P' but not the NIS.
func TestUpdateMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 7))
	for _, c := range conformanceCases(rng) {
		m, n := c.m, c.n
		f := randomFilter(t, rng, n)
		st := f.State()
		if n > 3 && rng.IntN(2) == 0 {
			// A state held for this update (Measurement.Hold): a consider
			// state for once, its gain row zero (Schmidt 1966).
			m.Hold = 1 << (3 + rng.IntN(n-3))
		}
		z0, Hs, _ := m.Predicted(st.x[:n])
		d := m.Kind.Dim()
		if m.Robust.Kind != RobustNone {
			// Three to five standard deviations off, where the weights bite.
			for i := 0; i < d; i++ {
				m.Z[i] = z0[i] + (3+2*rng.Float64())*math.Sqrt(m.R[i*3+i]+st.Var(IX))
			}
		}
		H := mat.NewDense(d, n, Hs)
		R := mat.NewDense(d, d, nil)
		v := mat.NewVecDense(d, nil)
		for i := 0; i < d; i++ {
			for j := 0; j < d; j++ {
				R.Set(i, j, m.R[i*3+j])
			}
			v.SetVec(i, m.Z[i]-z0[i])
			if m.Kind.IsAngle(i) {
				v.SetVec(i, Wrap(v.AtVec(i)))
			}
		}
		P := stateDense(&st)
		var pht, S, Sinv mat.Dense
		pht.Mul(P, H.T())
		S.Mul(H, &pht)
		S.Add(&S, R)
		logDetS, _ := mat.LogDet(&S) // of the raw S, before re-weighting
		if err := Sinv.Inverse(&S); err != nil {
			t.Fatal(err)
		}
		var siv mat.VecDense
		siv.MulVec(&Sinv, v)
		nis := mat.Dot(v, &siv)
		w := 1.0
		switch m.Robust.Kind {
		case RobustHuber:
			w = math.Min(1, m.Robust.Param/math.Sqrt(nis))
		case RobustStudentT:
			// The expected covariance of a Student-t error given its NIS
			// (StudentTCovWeight): E[1/lambda] = (nu + NIS)/(nu + d - 2).
			w = math.Min(1, (m.Robust.Param+float64(d)-2)/(m.Robust.Param+nis))
		}
		R.Scale(1/w, R)
		var extra [9]float64
		repeat := m.Kind != KindIMUHeading && rng.IntN(2) == 0
		if repeat {
			// A repeat's extra noise: positive definite, up to 10 times R.
			for i := 0; i < d; i++ {
				extra[i*3+i] = 10 * rng.Float64() * m.R[i*3+i]
				for j := 0; j < i; j++ {
					c := 0.3 * math.Sqrt(extra[i*3+i]*extra[j*3+j])
					extra[i*3+j], extra[j*3+i] = c, c
				}
			}
			for i := 0; i < d; i++ {
				for j := 0; j < d; j++ {
					R.Set(i, j, R.At(i, j)+extra[i*3+j])
				}
			}
		}
		S.Mul(H, &pht)
		S.Add(&S, R)
		if err := Sinv.Inverse(&S); err != nil {
			t.Fatal(err)
		}
		var K, ikh, a, want, krk mat.Dense
		K.Mul(&pht, &Sinv)
		for k := 0; k < f.layout.Biases(); k++ {
			if f.layout.IsLandmark(k) {
				continue // estimated
			}
			at, dim := f.layout.Bias(k)
			for i := at; i < at+dim; i++ {
				for j := 0; j < d; j++ {
					K.Set(i, j, 0)
				}
			}
		}
		for i := 0; i < n; i++ {
			if m.Hold&(1<<i) != 0 {
				for j := 0; j < d; j++ {
					K.Set(i, j, 0)
				}
			}
		}
		var kh mat.Dense
		kh.Mul(&K, H)
		ikh.Sub(eye(n), &kh)
		a.Mul(&ikh, P)
		want.Mul(&a, ikh.T())
		var kr mat.Dense
		kr.Mul(&K, R)
		krk.Mul(&kr, K.T())
		want.Add(&want, &krk)

		var out Outcome
		var err error
		if repeat {
			out, err = f.UpdateRepeat(&m, NoGate(), &extra)
		} else {
			out, err = f.Update(&m, NoGate())
		}
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(out.NIS-nis) > 1e-9*math.Max(1, nis) || math.Abs(out.Weight-w) > 1e-12 {
			t.Errorf("%s/%d: NIS %g weight %g, gonum %g and %g", m.Kind, n, out.NIS, out.Weight, nis, w)
		}
		var white float64
		for i := 0; i < d; i++ {
			white += out.Whitened[i] * out.Whitened[i]
		}
		if math.Abs(out.LogDetS-logDetS) > 1e-9*math.Max(1, math.Abs(logDetS)) || math.Abs(white-nis) > 1e-9*math.Max(1, nis) {
			t.Errorf("%s/%d: log det S %g, |whitened|^2 %g; gonum %g and NIS %g", m.Kind, n, out.LogDetS, white, logDetS, nis)
		}
		if m.Robust.Kind != RobustNone && !(w < 1) {
			t.Errorf("%s/%d: the robust weight did not bite (NIS %g)", m.Kind, n, nis)
		}
		after := f.State()
		compareMat(t, fmt.Sprintf("updated covariance %s/%d", m.Kind, n), 0, flatP(&after), &want, 1e-10)
		var dx mat.VecDense
		dx.MulVec(&K, v)
		for i := 0; i < n; i++ {
			w := st.x[i] + dx.AtVec(i)
			if st.isAngle(i) {
				w = Wrap(w)
			}
			if math.Abs(after.x[i]-w) > 1e-12 {
				t.Errorf("%s/%d: mean[%d] %g, gonum %g", m.Kind, n, i, after.x[i], w)
			}
		}
	}
}

func eye(n int) *mat.Dense {
	d := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		d.Set(i, i, 1)
	}
	return d
}

// TestGatedAndFailedUpdatesChangeNothing: a gated fix, a NaN fix and a fix
// whose innovation covariance is not positive definite leave the filter as
// it was.
func TestGatedAndFailedUpdatesChangeNothing(t *testing.T) {
	rng := rand.New(rand.NewPCG(8, 8))
	f := randomFilter(t, rng, 4)
	before := f.State()
	gates, _ := NewGates(0.99)
	far := Measurement{Kind: KindPosition, Z: [3]float64{50, 50}, R: [9]float64{0.01, 0, 0, 0, 0.01}}
	out, err := f.Update(&far, gates.For(2))
	if err != nil || !out.Gated {
		t.Errorf("far fix: outcome %+v, err %v; want gated", out, err)
	}
	nan := Measurement{Kind: KindHeading, Z: [3]float64{math.NaN()}, R: [9]float64{0.01}}
	if _, err := f.Update(&nan, NoGate()); !errors.Is(err, ErrNotFinite) {
		t.Errorf("NaN fix: err %v", err)
	}
	neg := Measurement{Kind: KindHeading, Z: [3]float64{0.1}, R: [9]float64{-100}}
	if _, err := f.Update(&neg, NoGate()); !errors.Is(err, ErrNotPositiveDefinite) {
		t.Errorf("negative variance: err %v", err)
	}
	lm := Measurement{Kind: KindRange, LandmarkX: before.x[0], LandmarkY: before.x[1], Z: [3]float64{1}, R: [9]float64{0.01}}
	if _, err := f.Update(&lm, NoGate()); !errors.Is(err, ErrDegenerate) {
		t.Errorf("landmark at the sensor: err %v", err)
	}
	if f.State() != before {
		t.Errorf("state changed by refused updates")
	}
}

// TestInitOffset: the initialised offset o = z - heading has the covariance
// of that linear map applied to the joint covariance of the other states
// and z: J diag(P without o, r) J^T with J mapping (.., h, .., z) to
// (.., h, .., z - h) (linear propagation of covariance, common practice).
func TestInitOffset(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 9))
	for _, n := range []int{4, 7, 12} {
		f := randomFilter(t, rng, n)
		st := f.State()
		const z, r = 2.9, 0.004
		if err := f.InitOffset(z, r); err != nil {
			t.Fatal(err)
		}
		// The joint covariance of the states with z in the offset's place.
		joint := mat.NewDense(n, n, nil)
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				if i != IOffset && j != IOffset {
					joint.Set(i, j, st.p[i*stride+j])
				}
			}
		}
		joint.Set(IOffset, IOffset, r)
		J := eye(n)
		J.Set(IOffset, IHead, -1)
		var jp, want mat.Dense
		jp.Mul(J, joint)
		want.Mul(&jp, J.T())
		after := f.State()
		compareMat(t, fmt.Sprintf("covariance after offset initialisation, %d states", n), 0, flatP(&after), &want, 1e-15)
		if got := after.x[IOffset]; math.Abs(got-Wrap(z-st.x[IHead])) > 1e-15 {
			t.Errorf("offset %g, want %g", got, Wrap(z-st.x[IHead]))
		}
	}
}

// TestRiccatiSteadyState: heading as a scalar random walk with variance q per
// interval, fixed by heading fixes of variance r each interval, converges to
// the closed-form steady state of the scalar discrete Riccati equation
// (derived by hand from P- = P+ + q, P+ = P- r / (P- + r)):
//
//	P- = (q + sqrt(q^2 + 4 q r)) / 2,   P+ = P- - q.
func TestRiccatiSteadyState(t *testing.T) {
	const q, r = 1e-4, 4e-3
	l := testLayout(3)
	f, err := NewFilter(&l, []float64{0, 0, 0}, []float64{1, 0, 0, 0, 1, 0, 0, 0, 1})
	if err != nil {
		t.Fatal(err)
	}
	var zero [9]float64
	qq := [MaxStates]float64{IHead: q}
	fix := Measurement{Kind: KindHeading, R: [9]float64{r}}
	var prior float64
	for i := 0; i < 2000; i++ {
		f.Predict(Step{}, &zero, 0.1, &qq)
		st := f.State()
		prior = st.Var(IHead)
		if _, err := f.Update(&fix, NoGate()); err != nil {
			t.Fatal(err)
		}
	}
	wantPrior := (q + math.Sqrt(q*q+4*q*r)) / 2
	st := f.State()
	if math.Abs(prior-wantPrior) > 1e-12 || math.Abs(st.Var(IHead)-(wantPrior-q)) > 1e-12 {
		t.Errorf("steady state prior %g posterior %g, closed form %g and %g", prior, st.Var(IHead), wantPrior, wantPrior-q)
	}
}

// TestNoAllocations pins zero allocations on the hot path, for every test
// layout (on 12 states with bias states and robust models).
func TestNoAllocations(t *testing.T) {
	rng := rand.New(rand.NewPCG(10, 10))
	for _, n := range testSizes {
		f := randomFilter(t, rng, n)
		cu := [9]float64{1e-6, 0, 0, 0, 1e-6, 0, 0, 0, 1e-6}
		q := [MaxStates]float64{IHead: 1e-8}
		u := Step{0.005, 0, 0.001}
		var ms []Measurement
		for _, m := range measurementCases(rng) {
			if m.Kind == KindIMUHeading && n < 4 {
				continue
			}
			if n == 12 {
				m = biased(m)
			}
			ms = append(ms, m)
		}
		allocs := testing.AllocsPerRun(100, func() {
			f.Predict(u, &cu, 0.005, &q)
			for i := range ms {
				_, _ = f.Update(&ms[i], GateAbove(1e9))
			}
		})
		if allocs != 0 {
			t.Errorf("%d states: Predict and Update allocate %v times per run", n, allocs)
		}
	}
}

// TestSolveSPD checks the fixed-size solver against gonum's.
func TestSolveSPD(t *testing.T) {
	rng := rand.New(rand.NewPCG(14, 14))
	for _, n := range testSizes {
		f := randomFilter(t, rng, n)
		st := f.State()
		a := st.p
		var b [MaxStates * MaxStates]float64
		for i := range b {
			b[i] = rng.NormFloat64()
		}
		B := mat.NewDense(n, n, nil)
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				B.Set(i, j, b[i*stride+j])
			}
		}
		var want mat.Dense
		if err := want.Solve(stateDense(&st), B); err != nil {
			t.Fatal(err)
		}
		if !SolveSPD(&a, n, &b, n) {
			t.Fatal("not positive definite")
		}
		got := make([]float64, 0, n*n)
		for i := 0; i < n; i++ {
			got = append(got, b[i*stride:i*stride+n]...)
		}
		compareMat(t, "SolveSPD", float64(n), got, &want, 1e-9)
	}
	var notPD [MaxStates * MaxStates]float64
	notPD[0], notPD[stride+1], notPD[2*stride+2] = 1, -1, 1
	var b [MaxStates * MaxStates]float64
	if SolveSPD(&notPD, 3, &b, 1) {
		t.Error("an indefinite matrix was solved")
	}
}

// TestCorrelateBias: a pose reset from a fix p = -J (b + w), where b are
// the first bias block's states and w white noise of covariance R, has the
// covariance T Sigma T^T of that linear map of (the states beyond the pose,
// w) (the linear transformation of a covariance, common practice): formed
// in gonum mat, it equals Reset with J (P_bb + R) J^T followed by
// CorrelateBias, entry by entry.
func TestCorrelateBias(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 3))
	const n = 12
	f := randomFilter(t, rng, n)
	at, _ := f.layout.Bias(0)
	bias := [3]int{at, at + 1, at + 2}
	j := [9]float64{1, 0, 0.3, 0, 1, -0.2, 0, 0, 1}
	R := mat.NewSymDense(3, []float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 4e-5})
	P0 := stateDense(&f.st)
	m := n - 3 // the states beyond the pose
	// Sigma over (x_3..x_{n-1}, w); T maps it to (pose, x_3..x_{n-1}).
	sigma := mat.NewDense(m+3, m+3, nil)
	sigma.Slice(0, m, 0, m).(*mat.Dense).Copy(P0.Slice(3, n, 3, n))
	sigma.Slice(m, m+3, m, m+3).(*mat.Dense).Copy(R)
	T := mat.NewDense(n, m+3, nil)
	J := mat.NewDense(3, 3, j[:])
	for a := 0; a < 3; a++ {
		for c := 0; c < 3; c++ {
			T.Set(a, bias[c]-3, -J.At(a, c))
			T.Set(a, m+c, -J.At(a, c))
		}
	}
	for i := 0; i < m; i++ {
		T.Set(3+i, i, 1)
	}
	var ts, want mat.Dense
	ts.Mul(T, sigma)
	want.Mul(&ts, T.T())
	var c [9]float64
	for a := 0; a < 3; a++ {
		for b := 0; b < 3; b++ {
			c[a*3+b] = want.At(a, b)
		}
	}
	if err := f.Reset(Pose{X: 1, Y: 2, Heading: 0.5}, &c); err != nil {
		t.Fatal(err)
	}
	if err := f.CorrelateBias(bias, &j); err != nil {
		t.Fatal(err)
	}
	got := stateDense(&f.st)
	for i := 0; i < n; i++ {
		for k := 0; k < n; k++ {
			if d := got.At(i, k) - want.At(i, k); math.Abs(d) > 1e-12 {
				t.Fatalf("P[%d,%d] = %g, want %g", i, k, got.At(i, k), want.At(i, k))
			}
		}
	}
	// A bias index outside the state is misuse, refused.
	if err := f.CorrelateBias([3]int{n}, &j); !errors.Is(err, ErrShape) {
		t.Errorf("bias state %d: err %v, want ErrShape", n, err)
	}
}
