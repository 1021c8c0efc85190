package estimator

import (
	"errors"
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/mat"
)

// randomFilter returns a filter with a random mean and a random
// well-conditioned covariance.
func randomFilter(t testing.TB, rng *rand.Rand, n int) *Filter {
	x := make([]float64, n)
	for i := range x {
		x[i] = rng.NormFloat64()
	}
	x[IHead] = Wrap(x[IHead] * 3)
	a := mat.NewDense(n, n, nil)
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			a.Set(i, j, 0.1*rng.NormFloat64())
		}
	}
	var p mat.Dense
	p.Mul(a, a.T())
	for i := 0; i < n; i++ {
		p.Set(i, i, p.At(i, i)+0.01)
	}
	f, err := NewFilter(n, x, p.RawMatrix().Data)
	if err != nil {
		t.Fatal(err)
	}
	return f
}

func stateDense(s *State) *mat.Dense {
	d := mat.NewDense(s.n, s.n, nil)
	for i := 0; i < s.n; i++ {
		for j := 0; j < s.n; j++ {
			d.Set(i, j, s.p[i*4+j])
		}
	}
	return d
}

func flatP(s *State) []float64 {
	out := make([]float64, 0, s.n*s.n)
	for i := 0; i < s.n; i++ {
		out = append(out, s.p[i*4:i*4+s.n]...)
	}
	return out
}

// TestPredictMatchesGonum: the fixed-size covariance propagation equals the
// same products formed with gonum mat.
func TestPredictMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 5))
	for _, n := range []int{3, 4} {
		for trial := 0; trial < 20; trial++ {
			f := randomFilter(t, rng, n)
			before := f.State()
			u := Step{rng.NormFloat64() * 0.1, rng.NormFloat64() * 0.02, rng.NormFloat64() * 0.3}
			cu := [9]float64{1e-4, 1e-5, 0, 1e-5, 2e-4, 3e-6, 0, 3e-6, 5e-4}
			q := [4]float64{0, 0, 1e-6, 2e-6}
			f.Predict(u, &cu, &q)
			var fx, fu [9]float64
			ArcJacobians(before.Pose(), u, &fx, &fu)
			F := mat.NewDense(n, n, nil)
			G := mat.NewDense(n, 3, nil)
			for i := 0; i < 3; i++ {
				for j := 0; j < 3; j++ {
					F.Set(i, j, fx[i*3+j])
					G.Set(i, j, fu[i*3+j])
				}
			}
			if n == 4 {
				F.Set(3, 3, 1)
			}
			var fp, want, gc, gcg mat.Dense
			fp.Mul(F, stateDense(&before))
			want.Mul(&fp, F.T())
			gc.Mul(G, mat.NewDense(3, 3, cu[:]))
			gcg.Mul(&gc, G.T())
			want.Add(&want, &gcg)
			for i := 0; i < n; i++ {
				want.Set(i, i, want.At(i, i)+q[i])
			}
			after := f.State()
			compareMat(t, "predicted covariance", float64(trial), flatP(&after), &want, 1e-12)
			wp := Advance(before.Pose(), u)
			if d := poseDist(wp, after.Pose()); d > 0 {
				t.Errorf("predicted mean %+v, want %+v", after.Pose(), wp)
			}
		}
	}
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

// TestMeasurementConformance is the suite every measurement model passes:
// its Jacobian equals central finite differences of its h(x) (gonum
// diff/fd), and after an update the covariance is symmetric, positive
// definite and no larger than before (trace).
func TestMeasurementConformance(t *testing.T) {
	rng := rand.New(rand.NewPCG(6, 6))
	for _, m := range measurementCases(rng) {
		t.Run(m.Kind.String(), func(t *testing.T) {
			for trial := 0; trial < 10; trial++ {
				f := randomFilter(t, rng, 4)
				st := f.State()
				x := st.x[:4]
				z0, H, err := m.Predicted(x)
				if err != nil {
					t.Fatal(err)
				}
				d := m.Kind.Dim()
				num := mat.NewDense(d, 4, nil)
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
				if out.Dim != d || out.NIS < 0 || math.IsNaN(out.NIS) {
					t.Errorf("outcome %+v", out)
				}
				after := f.State()
				if err := CheckCovariance(flatP(&after), 4); err != nil {
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
// P' = (I-KH) P (I-KH)^T + K R K^T, NIS = v^T S^-1 v
// (Bar-Shalom, Li and Kirubarajan, 2001, sections 5.2 and 5.4).
func TestUpdateMatchesGonum(t *testing.T) {
	rng := rand.New(rand.NewPCG(7, 7))
	for _, m := range measurementCases(rng) {
		f := randomFilter(t, rng, 4)
		st := f.State()
		z0, Hs, _ := m.Predicted(st.x[:4])
		d := m.Kind.Dim()
		H := mat.NewDense(d, 4, Hs)
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
		var pht, S, Sinv, K, ikh, a, want, krk mat.Dense
		pht.Mul(P, H.T())
		S.Mul(H, &pht)
		S.Add(&S, R)
		if err := Sinv.Inverse(&S); err != nil {
			t.Fatal(err)
		}
		K.Mul(&pht, &Sinv)
		var kh mat.Dense
		kh.Mul(&K, H)
		ikh.Sub(eye(4), &kh)
		a.Mul(&ikh, P)
		want.Mul(&a, ikh.T())
		var kr mat.Dense
		kr.Mul(&K, R)
		krk.Mul(&kr, K.T())
		want.Add(&want, &krk)
		var siv mat.VecDense
		siv.MulVec(&Sinv, v)
		nis := mat.Dot(v, &siv)

		out, err := f.Update(&m, NoGate())
		if err != nil {
			t.Fatal(err)
		}
		if math.Abs(out.NIS-nis) > 1e-9*math.Max(1, nis) {
			t.Errorf("%s: NIS %g, gonum %g", m.Kind, out.NIS, nis)
		}
		after := f.State()
		compareMat(t, "updated covariance "+m.Kind.String(), 0, flatP(&after), &want, 1e-10)
		var dx mat.VecDense
		dx.MulVec(&K, v)
		for i := 0; i < 4; i++ {
			w := st.x[i] + dx.AtVec(i)
			if i >= IHead {
				w = Wrap(w)
			}
			if math.Abs(after.x[i]-w) > 1e-12 {
				t.Errorf("%s: mean[%d] %g, gonum %g", m.Kind, i, after.x[i], w)
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
// of that linear map applied to the joint covariance of (x, y, heading, z):
// J diag(P, r) J^T with J mapping (x, y, h, z) to (x, y, h, z - h)
// (linear propagation of covariance, common practice).
func TestInitOffset(t *testing.T) {
	rng := rand.New(rand.NewPCG(9, 9))
	f := randomFilter(t, rng, 4)
	st := f.State()
	const z, r = 2.9, 0.004
	if err := f.InitOffset(z, r); err != nil {
		t.Fatal(err)
	}
	joint := mat.NewDense(4, 4, nil)
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			joint.Set(i, j, st.p[i*4+j])
		}
	}
	joint.Set(3, 3, r)
	J := mat.NewDense(4, 4, []float64{1, 0, 0, 0, 0, 1, 0, 0, 0, 0, 1, 0, 0, 0, -1, 1})
	var jp, want mat.Dense
	jp.Mul(J, joint)
	want.Mul(&jp, J.T())
	after := f.State()
	compareMat(t, "covariance after offset initialisation", 0, flatP(&after), &want, 1e-15)
	if got := after.x[IOffset]; math.Abs(got-Wrap(z-st.x[IHead])) > 1e-15 {
		t.Errorf("offset %g, want %g", got, Wrap(z-st.x[IHead]))
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
	f, err := NewFilter(3, []float64{0, 0, 0}, []float64{1, 0, 0, 0, 1, 0, 0, 0, 1})
	if err != nil {
		t.Fatal(err)
	}
	var zero [9]float64
	qq := [4]float64{0, 0, q}
	fix := Measurement{Kind: KindHeading, R: [9]float64{r}}
	var prior float64
	for i := 0; i < 2000; i++ {
		f.Predict(Step{}, &zero, &qq)
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

// TestNoAllocations pins zero allocations on the hot path.
func TestNoAllocations(t *testing.T) {
	rng := rand.New(rand.NewPCG(10, 10))
	f := randomFilter(t, rng, 4)
	cu := [9]float64{1e-6, 0, 0, 0, 1e-6, 0, 0, 0, 1e-6}
	q := [4]float64{0, 0, 1e-8, 1e-8}
	u := Step{0.005, 0, 0.001}
	ms := measurementCases(rng)
	allocs := testing.AllocsPerRun(100, func() {
		f.Predict(u, &cu, &q)
		for i := range ms {
			_, _ = f.Update(&ms[i], GateAbove(1e9))
		}
	})
	if allocs != 0 {
		t.Errorf("Predict and Update allocate %v times per run", allocs)
	}
}

// TestSolveSPD checks the fixed-size solver against gonum's.
func TestSolveSPD(t *testing.T) {
	rng := rand.New(rand.NewPCG(14, 14))
	for _, n := range []int{3, 4} {
		f := randomFilter(t, rng, n)
		st := f.State()
		a := st.p
		var b [16]float64
		for i := range b {
			b[i] = rng.NormFloat64()
		}
		B := mat.NewDense(n, n, nil)
		for i := 0; i < n; i++ {
			for j := 0; j < n; j++ {
				B.Set(i, j, b[i*4+j])
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
			got = append(got, b[i*4:i*4+n]...)
		}
		compareMat(t, "SolveSPD", float64(n), got, &want, 1e-9)
	}
	var notPD [16]float64
	notPD[0], notPD[5], notPD[10] = 1, -1, 1
	var b [16]float64
	if SolveSPD(&notPD, 3, &b, 1) {
		t.Error("an indefinite matrix was solved")
	}
}
