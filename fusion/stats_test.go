package fusion

import (
	"math"
	"math/rand/v2"
	"testing"

	"gonum.org/v1/gonum/integrate/quad"
	"gonum.org/v1/gonum/stat/distuv"
)

// TestTruncatedChiSquare checks the closed-form moments of a chi-square
// truncated at a gate against numerical integration of its density (gonum
// integrate/quad, Gauss-Legendre).
func TestTruncatedChiSquare(t *testing.T) {
	for _, d := range []int{1, 2, 3} {
		for _, p := range []float64{0.9, 0.99, 0.997} {
			dist := distuv.ChiSquared{K: float64(d)}
			q := dist.Quantile(p)
			// Substitute x = u^2 so that the d = 1 singularity at 0 goes.
			m1 := quad.Fixed(func(u float64) float64 { x := u * u; return 2 * u * x * dist.Prob(x) }, 0, math.Sqrt(q), 400, nil, 0) / p
			m2 := quad.Fixed(func(u float64) float64 { x := u * u; return 2 * u * x * x * dist.Prob(x) }, 0, math.Sqrt(q), 400, nil, 0) / p
			mean, sd := TruncatedChiSquare(d, p)
			if math.Abs(mean-m1) > 1e-9 || math.Abs(sd-math.Sqrt(m2-m1*m1)) > 1e-8 {
				t.Errorf("d %d p %v: mean %.10f sd %.10f, integration %.10f %.10f", d, p, mean, sd, m1, math.Sqrt(m2-m1*m1))
			}
		}
	}
}

// TestConsistencyOfGatedSensor: a gated sensor whose applied NIS average
// the truncated mean is consistent, where the plain chi-square band would
// call it underconfident.
func TestConsistencyOfGatedSensor(t *testing.T) {
	mean, _ := TruncatedChiSquare(3, 0.99)
	s := SensorStats{ID: "camera", VerdictCounts: VerdictCounts{Applied: 20000}, NISSum: mean * 20000, DOFSum: 60000, GateProbability: 0.99}
	if _, lo, hi, v := s.Consistency(); v != Consistent {
		t.Errorf("truncated mean %.3f: %s (band %.3f to %.3f)", mean, v, lo, hi)
	}
	s.GateProbability = 1
	if _, _, _, v := s.Consistency(); v != Underconfident {
		t.Errorf("judged as ungated: %s, want underconfident", v)
	}
}

// TestConsistencyCountsGatedFixes: a sensor whose fixes are gated far more
// often than its gate's probability allows is overconfident, even when the
// applied fixes, truncated by the gate, average below the band. The counts
// are made up; the limits come from the binomial test: with 1000 trials at
// 1 - 0.99, 10 are expected and P(X >= 20) is about 0.003, P(X >= 22) about
// 7e-4 (gonum stat/distuv.Binomial).
func TestConsistencyCountsGatedFixes(t *testing.T) {
	mean, _ := TruncatedChiSquare(3, 0.99)
	for _, c := range []struct {
		name           string
		applied, gated uint64
		meanScale      float64
		want           ConsistencyVerdict
	}{
		{"honest, 1% gated", 990, 10, 1, Consistent},
		{"20 of 1000 gated: not significant at 0.001", 980, 20, 1, Consistent},
		{"22 of 1000 gated", 978, 22, 1, Overconfident},
		{"10% gated, applied NIS low", 900, 100, 0.85, Overconfident},
		{"20% gated, applied NIS low", 800, 200, 0.85, Overconfident},
		{"1% gated, applied NIS low", 990, 10, 0.85, Underconfident},
	} {
		s := SensorStats{ID: "camera", VerdictCounts: VerdictCounts{Applied: c.applied, Gated: c.gated},
			NISSum: mean * c.meanScale * float64(c.applied), DOFSum: 3 * int(c.applied), GateProbability: 0.99}
		if _, lo, hi, v := s.Consistency(); v != c.want {
			t.Errorf("%s: %s (mean %.3f, band %.3f to %.3f), want %s", c.name, v, mean*c.meanScale, lo, hi, c.want)
		}
	}
	ungated := SensorStats{ID: "imu", VerdictCounts: VerdictCounts{Applied: 1000, Gated: 0}, NISSum: 1000, DOFSum: 1000, GateProbability: 1}
	if ungated.TooManyGated() {
		t.Error("an ungated sensor has too many gated")
	}
}

// TestTruncatedF checks TruncatedF's quadrature over the F density against
// a second method: X = c / lambda with c chi-square (d) and lambda ~
// Gamma(nu/2, nu/2) (the Student-t error's construction, Consistency), so
// P(X < q) = E[F_d(q lambda)], E[X; X < q] = E[d F_{d+2}(q lambda) /
// lambda] and E[X^2; X < q] = E[d(d+2) F_{d+4}(q lambda) / lambda^2], with
// F_k the chi-square distribution function (x f_k(x) = k f_{k+2}(x),
// TruncatedChiSquare), integrated over lambda's density; and, for one
// case, against a Monte Carlo draw of X.
func TestTruncatedF(t *testing.T) {
	for _, d := range []int{1, 2, 3} {
		for _, nu := range []float64{1.5, 4, 30} {
			q := distuv.ChiSquared{K: float64(d)}.Quantile(0.99)
			gam := distuv.Gamma{Alpha: nu / 2, Beta: nu / 2}
			top := math.Sqrt(gam.Quantile(1 - 1e-14))
			chi := func(k int, x float64) float64 { return distuv.ChiSquared{K: float64(k)}.CDF(x) }
			// lambda = v^2, d lambda = 2v dv: the density's singularity at 0
			// for nu < 2 goes.
			over := func(g func(l float64) float64) float64 {
				return quad.Fixed(func(v float64) float64 { l := v * v; return 2 * v * gam.Prob(l) * g(l) }, 0, top, 4000, nil, 0)
			}
			pass := over(func(l float64) float64 { return chi(d, q*l) })
			m1 := over(func(l float64) float64 { return float64(d) * chi(d+2, q*l) / l }) / pass
			m2 := over(func(l float64) float64 { return float64(d*(d+2)) * chi(d+4, q*l) / (l * l) }) / pass
			mean, sd, p := TruncatedF(d, nu, q)
			wantSD := math.Sqrt(m2 - m1*m1)
			if math.Abs(p-pass) > 1e-6 || math.Abs(mean-m1) > 1e-5*m1 || math.Abs(sd-wantSD) > 1e-4*wantSD {
				t.Errorf("d %d nu %v: pass %.7f mean %.7f sd %.7f, over lambda %.7f %.7f %.7f", d, nu, p, mean, sd, pass, m1, wantSD)
			}
			if fp := (distuv.F{D1: float64(d), D2: nu}).CDF(q / float64(d)); math.Abs(p-fp) > 1e-12 {
				t.Errorf("d %d nu %v: pass %v, F CDF %v", d, nu, p, fp)
			}
		}
	}
	// Monte Carlo: d = 3, nu = 4.
	rng := rand.New(rand.NewPCG(3, 4))
	gam := distuv.Gamma{Alpha: 2, Beta: 2, Src: rng}
	q := distuv.ChiSquared{K: 3}.Quantile(0.99)
	var n, in, s1, s2 float64
	for range 400000 {
		x := 0.0
		for range 3 {
			z := rng.NormFloat64()
			x += z * z
		}
		x /= gam.Rand()
		n++
		if x < q {
			in++
			s1 += x
			s2 += x * x
		}
	}
	mean, sd, p := TruncatedF(3, 4, q)
	mcMean, mcSD := s1/in, math.Sqrt(s2/in-(s1/in)*(s1/in))
	if se := math.Sqrt(p * (1 - p) / n); math.Abs(in/n-p) > 4*se {
		t.Errorf("Monte Carlo pass %.5f, TruncatedF %.5f (se %.5f)", in/n, p, se)
	}
	if se := mcSD / math.Sqrt(in); math.Abs(mcMean-mean) > 4*se {
		t.Errorf("Monte Carlo mean %.5f, TruncatedF %.5f (se %.5f)", mcMean, mean, se)
	}
	if math.Abs(mcSD-sd) > 0.01*sd {
		t.Errorf("Monte Carlo sd %.5f, TruncatedF %.5f", mcSD, sd)
	}
}

// studentTRecord returns the record of a 3-dimensional Student-t sensor
// (nu = 4, the default; gate at 0.99) over n fixes whose errors are scale
// times R^(1/2) z / sqrt(lambda), lambda ~ Gamma(nu/2, nu/2): the sensor's
// declared model when scale is 1. The prior's error, Gaussian with
// covariance P = R/100 (sparse fixes: R dominates), is added, and the NIS
// is taken in S = R + P, as the filter takes it. R is the identity (the NIS
// does not depend on it).
func studentTRecord(rng *rand.Rand, n int, scale float64) (SensorStats, int) {
	const nu, d, prior = 4.0, 3, 0.01
	gam := distuv.Gamma{Alpha: nu / 2, Beta: nu / 2, Src: rng}
	q := distuv.ChiSquared{K: d}.Quantile(0.99)
	s := SensorStats{ID: "camera", GateProbability: 0.99, Robust: RobustStudentT, RobustParameter: nu}
	gated := 0
	for range n {
		w := scale / math.Sqrt(gam.Rand())
		nis := 0.0
		for range d {
			v := w*rng.NormFloat64() + math.Sqrt(prior)*rng.NormFloat64()
			nis += v * v / (1 + prior)
		}
		if nis > q {
			s.Gated++
			gated++
			continue
		}
		s.Applied++
		s.NISSum += nis
		s.DOFSum += d
	}
	return s, gated
}

// TestConsistencyOfStudentTSensor: a Student-t sensor fed errors from its
// declared model, with a small prior covariance, is gated about as often
// as its F(3, 4) tail says (1 - F_{3,4}(q/3), gonum distuv.F: 11.6% at a
// 0.99 chi-square gate, against the 1% of a Gaussian sensor), and is called
// consistent in most runs, overconfident in few: the band's 5% and the
// binomial test's 0.1%, and a little less, for the prior's Gaussian part
// makes the tail lighter. The code before it called such a sensor
// overconfident in every run (its gated count tested against 1%).
func TestConsistencyOfStudentTSensor(t *testing.T) {
	rng := rand.New(rand.NewPCG(23, 1))
	const runs, fixes = 200, 400
	consistent, over, gated := 0, 0, 0
	for range runs {
		s, g := studentTRecord(rng, fixes, 1)
		gated += g
		switch _, _, _, v := s.Consistency(); v {
		case Consistent:
			consistent++
		case Overconfident:
			over++
		}
	}
	q := distuv.ChiSquared{K: 3}.Quantile(0.99)
	tail := distuv.F{D1: 3, D2: 4}.Survival(q / 3)
	share := float64(gated) / (runs * fixes)
	if se := math.Sqrt(tail * (1 - tail) / (runs * fixes)); math.Abs(share-tail) > 4*se {
		t.Errorf("gated share %.4f, F(3, 4) tail %.4f (se %.4f)", share, tail, se)
	}
	t.Logf("gated share %.4f (F tail %.4f); %d of %d runs consistent, %d overconfident", share, tail, consistent, runs, over)
	if consistent < runs*85/100 || over > runs*5/100 {
		t.Errorf("declared errors: %d of %d runs consistent, %d overconfident", consistent, runs, over)
	}
}

// TestConsistencyOfWideStudentTSensor: a Student-t sensor whose errors are
// three times its declared scale is still called overconfident in every
// run: the Student-t test widens what a consistent sensor shows, not what
// an overconfident one may.
func TestConsistencyOfWideStudentTSensor(t *testing.T) {
	rng := rand.New(rand.NewPCG(23, 2))
	for i := range 50 {
		s, _ := studentTRecord(rng, 400, 3)
		if m, lo, hi, v := s.Consistency(); v != Overconfident {
			t.Fatalf("run %d: errors 3x the declared scale: %s (mean NIS %.3f, band %.3f to %.3f, %d of %d gated)",
				i, v, m, lo, hi, s.Gated, s.Gated+s.Applied)
		}
	}
}
