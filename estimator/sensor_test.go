package estimator

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/diff/fd"
	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/mat"
)

// TestGaussMarkovSteadyState: a heading that is a random walk (variance q
// per interval T) measured every T by a heading sensor whose error is a
// white part of variance r plus a first-order Gauss-Markov bias b (phi =
// exp(-T/tau), stationary variance s2), the bias a consider state. The
// consider filter's steady state, derived here by hand:
//
// With the prior covariance [[a, c], [c, s2]] of (heading, b) (b's
// variance stays s2: phi^2 s2 + (1 - phi^2) s2 = s2), H = [1 1],
// S = a + 2c + s2 + r and the gain K = [k, 0], k = (a + c)/S. The Joseph
// form gives the posterior heading variance a - 2k(a + c) + k^2 S =
// a - (a + c)^2/S and the cross-covariance c - k(c + s2); prediction adds q
// to the first and multiplies the second by phi. At the fixed point, with
// m = a + c:
//
//	m^2 = q S = q (m + c + s2 + r)          (1)
//	c (1 - phi) = -phi k (c + s2), k = q/m  =>  c = -phi q s2 / (m (1 - phi) + phi q)   (2)
//
// (2) into (1) leaves one equation in m > 0 whose left side minus right
// side increases with m, solved here by bisection. Two limits are closed
// forms: phi = 0 (a white bias) gives the scalar Riccati solution
// m = (q + sqrt(q^2 + 4 q (s2 + r)))/2, c = 0; phi -> 1 (a constant bias)
// gives c = -s2 and m = (q + sqrt(q^2 + 4 q r))/2, so a = m + s2: the
// constant bias adds its whole variance to the heading's, however many
// fixes come.
func TestGaussMarkovSteadyState(t *testing.T) {
	const q, r, s2, T = 1e-4, 4e-3, 2e-3, 0.1
	for _, tau := range []float64{0.02, 0.5, 2, 1e12} {
		phi := math.Exp(-T / tau)
		cOf := func(m float64) float64 { return -phi * q * s2 / (m*(1-phi) + phi*q) }
		g := func(m float64) float64 { return m*m - q*(m+cOf(m)+s2+r) }
		lo, hi := 1e-12, 10.0
		for i := 0; i < 200; i++ {
			mid := (lo + hi) / 2
			if g(mid) > 0 {
				hi = mid
			} else {
				lo = mid
			}
		}
		m := (lo + hi) / 2
		wantA, wantC := m-cOf(m), cOf(m)
		if tau == 1e12 {
			mr := (q + math.Sqrt(q*q+4*q*r)) / 2
			if math.Abs(wantA-(mr+s2)) > 1e-9 || math.Abs(wantC+s2) > 1e-9 {
				t.Errorf("constant-bias limit: a %g c %g, closed form %g and %g", wantA, wantC, mr+s2, -s2)
			}
		}
		l := MustLayout(LayoutSpec{Biases: []BiasSpec{{Dim: 1, TauS: tau, Cov: [9]float64{s2}}}})
		p := make([]float64, 16)
		p[0], p[5], p[10], p[15] = 1, 1, 1, s2
		f, err := NewFilter(&l, make([]float64, 4), p)
		if err != nil {
			t.Fatal(err)
		}
		var zero [9]float64
		qq := [MaxStates]float64{IHead: q}
		fix := Measurement{Kind: KindHeading, R: [9]float64{r}, Bias: [3]int{3}}
		var prior State
		for i := 0; i < 20000; i++ {
			f.Predict(Step{}, &zero, T, &qq)
			prior = f.State()
			if _, err := f.Update(&fix, NoGate()); err != nil {
				t.Fatal(err)
			}
		}
		if math.Abs(prior.At(IHead, IHead)-wantA) > 1e-10 || math.Abs(prior.At(IHead, 3)-wantC) > 1e-10 || math.Abs(prior.At(3, 3)-s2) > 1e-12 {
			t.Errorf("tau %g: prior heading variance %g, cross %g, bias %g; derived %g, %g, %g", tau,
				prior.At(IHead, IHead), prior.At(IHead, 3), prior.At(3, 3), wantA, wantC, s2)
		}
	}
}

// TestDecayComposes: predicting over dt, or over f dt and then (1 - f) dt,
// gives the same bias covariance (phi(f dt) phi((1-f) dt) = phi(dt), and
// the Gauss-Markov variances add up to the same), to 1e-15 relative; the
// pose part composes as the arc does.
func TestDecayComposes(t *testing.T) {
	rng := rand.New(rand.NewPCG(16, 16))
	const dt = 0.37
	for _, frac := range []float64{0.5, 0.13, 0.9} {
		whole := randomFilter(t, rng, 12)
		parts := &Filter{layout: whole.layout, st: whole.st}
		u := Step{0.2, 0.01, 0.3}
		var cu [9]float64
		var q [MaxStates]float64
		whole.Predict(u, &cu, dt, &q)
		parts.Predict(u.Scale(frac), &cu, frac*dt, &q)
		parts.Predict(u.Scale(1-frac), &cu, (1-frac)*dt, &q)
		for k := 0; k < whole.layout.Biases(); k++ {
			at, dim := whole.layout.Bias(k)
			tau := whole.layout.blocks[k].TauS
			if d := math.Exp(-frac*dt/tau)*math.Exp(-(1-frac)*dt/tau) - math.Exp(-dt/tau); math.Abs(d) > 1e-15 {
				t.Errorf("phi does not compose: %g", d)
			}
			for i := at; i < at+dim; i++ {
				for j := 0; j < whole.st.n; j++ {
					a, b := whole.st.At(i, j), parts.st.At(i, j)
					if math.Abs(a-b) > 1e-13*math.Max(1e-3, math.Abs(a)) {
						t.Errorf("f %g: covariance (%d,%d) whole %g, in parts %g", frac, i, j, a, b)
					}
				}
			}
		}
		if d := poseDist(whole.Pose(), parts.Pose()); d > 1e-12 {
			t.Errorf("f %g: poses differ by %g", frac, d)
		}
	}
}

// TestRobustWeights checks the weight functions on a scalar residual e (in
// standard deviations, NIS = e^2) against their published forms: Huber's
// psi(e)/e with psi(e) = e within k and k sign(e) beyond (Huber 1964;
// k = 1.345, the 95%-efficiency constant, common practice), and the
// Student-t weight (nu + 1)/(nu + e^2), the posterior mean of the precision
// scale of a Student-t error with nu degrees of freedom given e (Roth, Ozkan
// and Gustafsson 2013), capped at 1 as StudentTWeight documents; and the
// weight the update uses, the inverse of the posterior mean of 1/lambda
// (StudentTCovWeight), by quadrature of that posterior.
func TestRobustWeights(t *testing.T) {
	const k, nu = 1.345, 4.0
	for _, e := range []float64{0, 0.5, 1, 1.345, 2, 3, 5, 8, -4} {
		psi := e
		if math.Abs(e) > k {
			psi = math.Copysign(k, e)
		}
		wantH := 1.0
		if e != 0 {
			wantH = psi / e
		}
		if got := HuberWeight(e*e, k); math.Abs(got-wantH) > 1e-15 {
			t.Errorf("Huber weight at %g sigma: %g, want %g", e, got, wantH)
		}
		wantT := math.Min(1, (nu+1)/(nu+e*e))
		if got := StudentTWeight(e*e, nu, 1); math.Abs(got-wantT) > 1e-15 {
			t.Errorf("Student-t weight at %g sigma: %g, want %g", e, got, wantT)
		}
		// The posterior of the precision scale lambda given e is
		// proportional to lambda^((nu+1)/2 - 1) exp(-lambda (nu + e^2)/2);
		// E[1/lambda] by quadrature (gonum integrate/quad, Legendre) against
		// StudentTCovWeight's closed form (nu + e^2)/(nu - 1).
		post := func(l float64, p float64) float64 {
			return math.Pow(l, (nu+1)/2-1+p) * math.Exp(-l*(nu+e*e)/2)
		}
		// Substituting lambda = u/(1-u) maps (0, inf) onto (0, 1).
		moment := func(p float64) float64 {
			return quad.Fixed(func(u float64) float64 {
				l := u / (1 - u)
				return post(l, p) / ((1 - u) * (1 - u))
			}, 0, 1, 2000, nil, 0)
		}
		wantC := math.Min(1, moment(0)/moment(-1))
		if got := (Robust{Kind: RobustStudentT, Param: nu}).Weight(e*e, 1); math.Abs(got-wantC) > 1e-6 {
			t.Errorf("Student-t covariance weight at %g sigma: %g, want 1/E[1/lambda] = %g", e, got, wantC)
		}
		if got := (Robust{}).Weight(e*e, 1); got != 1 {
			t.Errorf("no robust model: weight %g", got)
		}
	}
	// At 5 sigma a scalar update with Huber's weight moves the estimate by
	// P/(P + r/w) of the innovation instead of P/(P + r).
	l := MustLayout(LayoutSpec{})
	f, _ := NewFilter(&l, []float64{0, 0, 0}, []float64{1, 0, 0, 0, 1, 0, 0, 0, 0.01})
	m := Measurement{Kind: KindHeading, Z: [3]float64{0.5}, R: [9]float64{0.01}, Robust: Robust{Kind: RobustHuber, Param: k}}
	out, err := f.Update(&m, NoGate())
	if err != nil {
		t.Fatal(err)
	}
	nis := 0.25 / 0.02
	w := k / math.Sqrt(nis)
	if want := 0.01 / (0.01 + 0.01/w) * 0.5; math.Abs(f.Pose().Heading-want) > 1e-15 || math.Abs(out.NIS-nis) > 1e-12 {
		t.Errorf("heading %g (NIS %g), want %g (NIS %g)", f.Pose().Heading, out.NIS, want, nis)
	}
}

// TestLandmarkVarIsWhiteNoise: a landmark's survey variance carried as
// white noise of one fix (LandmarkVar) updates exactly as the same fix with
// R + v J J^T, J the measurement's Jacobian in the landmark's position,
// which is minus its Jacobian in the robot's (closed form: h depends on the
// landmark and the robot only through their difference).
func TestLandmarkVarIsWhiteNoise(t *testing.T) {
	rng := rand.New(rand.NewPCG(21, 4))
	for _, kind := range []Kind{KindRangeBearing, KindRange, KindBearing} {
		for trial := 0; trial < 20; trial++ {
			f := randomFilter(t, rng, 4)
			g := *f
			m := Measurement{Kind: kind, Mount: Pose{X: 0.1, Y: -0.05, Heading: 0.2}, LandmarkX: 3 + rng.Float64(), LandmarkY: -2 + rng.Float64()}
			d := kind.Dim()
			for i := 0; i < d; i++ {
				m.R[i*3+i] = 0.01 + 0.01*rng.Float64()
			}
			st := f.State()
			z0, _, err := m.Predicted(st.x[:4])
			if err != nil {
				t.Fatal(err)
			}
			// J from finite differences of h in the landmark's position
			// (gonum diff/fd), independent of the filter's Jacobian.
			J := mat.NewDense(d, 2, nil)
			fd.Jacobian(J, func(dst, l []float64) {
				mm := m
				mm.LandmarkX, mm.LandmarkY = l[0], l[1]
				z, _, _ := mm.Predicted(st.x[:4])
				for i := range dst {
					dst[i] = z0[i] + Wrap(z[i]-z0[i])
				}
			}, []float64{m.LandmarkX, m.LandmarkY}, &fd.JacobianSettings{Formula: fd.Central})
			for i := 0; i < d; i++ {
				m.Z[i] = z0[i] + 0.03*rng.NormFloat64()
			}
			const v = 0.0009
			white := m
			for i := 0; i < d; i++ {
				for j := 0; j < d; j++ {
					white.R[i*3+j] += v * (J.At(i, 0)*J.At(j, 0) + J.At(i, 1)*J.At(j, 1))
				}
			}
			m.LandmarkVar = v
			a, err := f.Update(&m, NoGate())
			if err != nil {
				t.Fatal(err)
			}
			b, err := g.Update(&white, NoGate())
			if err != nil {
				t.Fatal(err)
			}
			if math.Abs(a.NIS-b.NIS) > 1e-6*(1+b.NIS) {
				t.Fatalf("%s trial %d: NIS %v with LandmarkVar, %v with R inflated by hand", kind, trial, a.NIS, b.NIS)
			}
			sa, sb := f.State(), g.State()
			for i := 0; i < 4; i++ {
				if math.Abs(sa.MeanAt(i)-sb.MeanAt(i)) > 1e-8 {
					t.Fatalf("%s trial %d: mean %d %v against %v", kind, trial, i, sa.MeanAt(i), sb.MeanAt(i))
				}
				for j := 0; j < 4; j++ {
					if math.Abs(sa.At(i, j)-sb.At(i, j)) > 1e-8*(1+math.Abs(sb.At(i, j))) {
						t.Fatalf("%s trial %d: P[%d,%d] %v against %v", kind, trial, i, j, sa.At(i, j), sb.At(i, j))
					}
				}
			}
		}
	}
}

// TestSeedBlockMarginalises: giving a landmark block to another landmark
// leaves the covariance of every other state as it was (the Gaussian
// marginal of the rest; Bar-Shalom, Li and Kirubarajan, 2001, section
// 1.4.14, from memory), and the block at its new prior, uncorrelated.
func TestSeedBlockMarginalises(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 17))
	for trial := 0; trial < 20; trial++ {
		f := randomFilter(t, rng, 9)
		before := f.State()
		c := [4]float64{0.04, 0.01, 0.01, 0.09}
		if err := f.SeedBlock(7, &c); err != nil {
			t.Fatal(err)
		}
		after := f.State()
		for i := 0; i < 9; i++ {
			for j := 0; j < 9; j++ {
				inI, inJ := i == 7 || i == 8, j == 7 || j == 8
				want := before.At(i, j)
				switch {
				case inI && inJ:
					want = c[(i-7)*2+j-7]
				case inI || inJ:
					want = 0
				}
				if after.At(i, j) != want {
					t.Fatalf("trial %d: P[%d,%d] = %v, want %v", trial, i, j, after.At(i, j), want)
				}
			}
		}
		if after.MeanAt(7) != 0 || after.MeanAt(8) != 0 {
			t.Fatalf("trial %d: block mean %v %v, want 0", trial, after.MeanAt(7), after.MeanAt(8))
		}
		if err := CheckCovariance(stateDense(&after).RawMatrix().Data, 9); err != nil {
			t.Fatalf("trial %d: %v", trial, err)
		}
		bad := [4]float64{0.04, 0.1, 0.1, 0.09}
		if err := f.SeedBlock(7, &bad); err == nil {
			t.Fatalf("a non-positive-definite prior was taken")
		}
	}
}
