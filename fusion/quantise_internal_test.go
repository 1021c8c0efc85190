package fusion

import (
	"math"
	"testing"
)

// TestCountsTurnVar checks Config.countsTurnVar against closed forms. A
// differential drive's turn is (right - left) / track, so each wheel's
// residual, uniform over one count (variance 1/(12 c^2), common practice
// for a floored reading), enters divided by the track: 2 / (12 c^2 b^2).
// Three wheels, two parallel at +-b/2 and one lateral wheel, give the same
// turn from the parallel pair (the lateral wheel's row fixes only the
// sideways travel). Travels in metres or imu_mode rotation: none.
func TestCountsTurnVar(t *testing.T) {
	const c, b = 179.0, 0.45
	diff := []Wheel{{Name: "l", YM: b / 2, CountsPerM: c}, {Name: "r", YM: -b / 2, CountsPerM: c}}
	want := 2 / (12 * c * c * b * b)
	three := append(append([]Wheel(nil), diff...), Wheel{Name: "s", XM: -0.2, DirectionRad: math.Pi / 2, CountsPerM: c})
	metres := []Wheel{{Name: "l", YM: b / 2}, {Name: "r", YM: -b / 2}}
	for _, tc := range []struct {
		name string
		cfg  Config
		want float64
	}{
		{"differential", Config{Wheels: diff, NoSideSlip: true, IMU: IMUAbsolute}, want},
		{"two and a lateral", Config{Wheels: three, IMU: IMUAbsolute}, want},
		{"metres", Config{Wheels: metres, NoSideSlip: true, IMU: IMUAbsolute}, 0},
		{"rotation", Config{Wheels: diff, NoSideSlip: true, IMU: IMURotation}, 0},
	} {
		cfg := tc.cfg.withDefaults()
		if got := cfg.countsTurnVar(); math.Abs(got-tc.want) > 1e-9*tc.want {
			t.Errorf("%s: %g rad^2, want %g", tc.name, got, tc.want)
		}
	}
}
