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
