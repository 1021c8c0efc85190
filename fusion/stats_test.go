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
