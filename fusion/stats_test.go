package fusion

import (
	"math"
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
