package calib

import (
	"math"
	"testing"
)

// TestUpperEnd: along one level whose log-likelihood is that of n normal
// observations of mean square s under the variance v, -(n/2)(log v +
// s/v), the upper end of the 95% likelihood interval is the v above s
// where (n/2)(log(v/s) + s/v - 1) = 1.92 (the likelihood-ratio interval
// of a normal variance: S. S. Wilks, Annals of Mathematical Statistics
// 9(1), 1938; the chi-square quantile 3.84 of one degree of freedom, from
// memory, halved). upperEnd finds it within 1% from a start a hundred
// times too low or ten times too high, and a level along which the
// log-likelihood is flat (a sensor without fixes) is bounded nowhere,
// which it sees within 5 evaluations.
func TestUpperEnd(t *testing.T) {
	const n, s = 50.0, 2e-4
	// The exact upper end, by bisection of the closed form in log v.
	lo, hi := math.Log(s), math.Log(s)+5
	for range 100 {
		m := (lo + hi) / 2
		if v := math.Exp(m); n/2*(math.Log(v/s)+s/v-1) < 1.92 {
			lo = m
		} else {
			hi = m
		}
	}
	want := math.Exp(lo)
	var p replayer
	for _, start := range []float64{s / 100, 10 * s} {
		calls := 0
		obj := func(y []float64) float64 {
			calls++
			v := math.Exp(y[1])
			return n / 2 * (math.Log(v) + s/v)
		}
		got, best, ok := p.upperEnd(obj, []float64{1, start}, 1)
		t.Logf("from %.3g: upper end %.5g (want %.5g), best %.3g, %d evaluations", start, got, want, best, calls)
		if !ok || math.Abs(got/want-1) > 0.01 {
			t.Errorf("from %.3g: upper end %.5g (found %v), want %.5g", start, got, ok, want)
		}
	}
	calls := 0
	if _, _, ok := p.upperEnd(func([]float64) float64 { calls++; return 3 }, []float64{1, s}, 1); ok || calls > 5 {
		t.Errorf("a flat log-likelihood gave an upper end (%v) or took %d evaluations, not at most 5", ok, calls)
	}
}
