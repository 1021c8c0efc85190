package estimator

import "math"

// Wrap returns the angle a (radians) wrapped to (-pi, pi].
func Wrap(a float64) float64 {
	if a > -math.Pi && a <= math.Pi {
		return a
	}
	a = math.Mod(a, 2*math.Pi) // (-2pi, 2pi)
	if a <= -math.Pi {
		a += 2 * math.Pi
	} else if a > math.Pi {
		a -= 2 * math.Pi
	}
	return a
}

// Unwrap returns the angle d (radians, a difference of wrapped angles)
// plus the whole turns that bring it nearest to near, another measure of
// the same turn: an IMU's turn over a silence from the difference of its
// wrapped headings, by the estimate's own turn over the silence. It is
// the true turn when near is within half a turn of it, and off by whole
// turns otherwise: an own turn off by more than half a turn cannot
// unwrap.
func Unwrap(d, near float64) float64 {
	return d + 2*math.Pi*math.Round((near-d)/(2*math.Pi))
}
