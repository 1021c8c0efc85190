package review

import (
	"math"
	"math/rand/v2"
	"sort"
	"strings"
	"testing"
)

// TestTruthInterpolation checks the truth interpolated to stamps between,
// at and outside its rows against values computed by hand.
func TestTruthInterpolation(t *testing.T) {
	const csvText = "stamp_ns,x_m,y_m,heading_rad\n" +
		"1000,0,0,0\n" +
		"1100,1,2,0.4\n" +
		"1300,3,2,3.0\n" +
		"1400,3,4,-3.0\n"
	tr := newTruthReader(strings.NewReader(csvText))
	for _, c := range []struct {
		stamp     int64
		ok        bool
		x, y, h   float64
		gapNs     int64
		reasoning string
	}{
		{900, false, 0, 0, 0, 0, "before the first row"},
		{1000, true, 0, 0, 0, 0, "exactly the first row"},
		{1025, true, 0.25, 0.5, 0.1, 100, "a quarter of the way: 0.25*1, 0.25*2, 0.25*0.4"},
		{1200, true, 2, 2, 1.7, 200, "half way: (1+3)/2, 2, (0.4+3.0)/2"},
		// Across the wrap: 3.0 to -3.0 is +0.2832 rad (2*pi - 6); a
		// quarter of it is 0.0708, so 3.0708 rad.
		{1325, true, 3, 2.5, 3 + 0.25*(2*math.Pi-6), 100, "wrapped heading"},
		// Three quarters: 3.0 + 0.75*0.2832 = 3.2124, wrapped to -3.0708.
		{1375, true, 3, 3.5, 3 + 0.75*(2*math.Pi-6) - 2*math.Pi, 100, "wrapped past pi"},
		{1400, true, 3, 4, -3.0, 0, "exactly the last row"},
		{1500, false, 0, 0, 0, 0, "after the last row"},
	} {
		p, gap, ok := tr.at(c.stamp)
		if ok != c.ok {
			t.Fatalf("%s: at(%d) ok %v", c.reasoning, c.stamp, ok)
		}
		if !ok {
			continue
		}
		const tol = 1e-12
		if math.Abs(p.X-c.x) > tol || math.Abs(p.Y-c.y) > tol || math.Abs(p.Heading-c.h) > tol || gap != c.gapNs {
			t.Errorf("%s: at(%d) = %+v gap %d, want (%g, %g, %g) gap %d", c.reasoning, c.stamp, p, gap, c.x, c.y, c.h, c.gapNs)
		}
	}
}

// TestLogHistogramMedian: the bounded median is within half a bin (0.05%)
// of the exact one, for chi-square-like values over several decades, and
// for values outside the bins counted in an array (below 6e-15, above
// 1.6e14) or across them, with zeros or not, wherever the median falls.
func TestLogHistogramMedian(t *testing.T) {
	rng := rand.New(rand.NewPCG(79, 79))
	for _, c := range []struct {
		n      int
		lo, hi float64 // uniform log range; 0, 0 for chi-square-like values
		zeros  bool
	}{{1, 0, 0, false}, {2, 0, 0, false}, {101, 0, 0, false}, {10000, 0, 0, false},
		{1001, -200, -40, false}, {1001, 40, 200, false}, {1001, -60, 60, false},
		{1001, -200, 200, true}, {3, -60, 60, true}, {10000, 33, 40, true}} {
		var h logHistogram
		v := make([]float64, c.n)
		for i := range v {
			v[i] = math.Exp(c.lo + (c.hi-c.lo)*rng.Float64())
			if c.lo == c.hi {
				v[i] = math.Exp(3 * rng.NormFloat64())
			}
			if c.zeros && i%3 == 0 {
				v[i] = 0
			}
			h.add(v[i])
		}
		sort.Float64s(v)
		if got, want := h.median(), v[c.n/2]; math.Abs(got-want) > 5e-4*want {
			t.Errorf("%+v: median %g, exact %g", c, got, want)
		}
	}
}
