package estimator

import (
	"math"
	"testing"
)

// TestUnwrap: an angle known only modulo a whole turn (2 pi; the
// definition of a wrapped angle) comes back as the true turn when the
// other measure is within half a turn of it, and off by whole turns when
// it is further: turns of -20 to 20 rad, measures off by up to 0.99 pi
// either way, and by 1.01 pi.
func TestUnwrap(t *testing.T) {
	for turn := -20.0; turn <= 20; turn += 0.37 {
		for _, off := range []float64{-0.99 * math.Pi, -1, 0, 0.5, 0.99 * math.Pi} {
			if got := Unwrap(Wrap(turn), turn+off); math.Abs(got-turn) > 1e-12 {
				t.Errorf("turn %.2f rad, measure %.2f rad off: unwrapped to %v", turn, off, got)
			}
		}
		for _, off := range []float64{-1.01 * math.Pi, 1.01 * math.Pi} {
			got := Unwrap(Wrap(turn), turn+off)
			if whole := math.Round((got - turn) / (2 * math.Pi)); whole != math.Copysign(1, off) || math.Abs(got-turn-2*math.Pi*whole) > 1e-12 {
				t.Errorf("turn %.2f rad, measure %.2f rad off: unwrapped to %v, not a whole turn off towards it", turn, off, got)
			}
		}
	}
}
