package fusion

import (
	"math"
	"testing"
)

// TestScrubChargeSplits: the scrub's charge of a steady turn does not
// depend on how the turn is cut into intervals, across block edges, on
// either side of stamp zero, and for an interval many blocks long (whose
// whole blocks are charged at once); a steady turn is charged its whole
// absolute value (common practice: the scrub is per radian turned).
func TestScrubChargeSplits(t *testing.T) {
	const rate = -0.7 // rad/s
	for _, span := range [][2]int64{{-1_300_000_000, 2_100_000_000}, {0, 250_000_000}, {40_000_001, 9_000_000_007}} {
		a, b := span[0], span[1]
		want := math.Abs(rate * float64(b-a) * 1e-9)
		for _, pieces := range []int64{1, 3, 17, 1000} {
			var s scrubState
			var got float64
			for k := int64(0); k < pieces; k++ {
				t0, t1 := a+(b-a)*k/pieces, a+(b-a)*(k+1)/pieces
				got += s.charge(t0, t1, rate*float64(t1-t0)*1e-9)
			}
			if math.Abs(got-want) > 1e-12 {
				t.Errorf("[%d, %d] in %d pieces: charged %.15g rad, want %.15g", a, b, pieces, got, want)
			}
		}
	}
	// A turn that reverses within a block is charged its larger part.
	var s scrubState
	got := s.charge(0, 100e6, 0.03) + s.charge(100e6, 200e6, -0.02)
	if math.Abs(got-0.03) > 1e-15 {
		t.Errorf("0.03 rad one way then 0.02 back within a block: charged %g, want 0.03", got)
	}
}
