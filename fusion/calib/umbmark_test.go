package calib

import (
	"errors"
	"math"
	"testing"

	"reckon.example/estimator"
)

// squareRun drives a differential drive round a square of side sideM by its
// odometry (the controller believes nominal wheels of equal size, wheelbase
// nominalB) and returns the true stopping position less the computed one.
// The true wheels roll scaleL and scaleR times the travel the robot
// believes, trueB apart; the truth and the belief both advance by the arc
// model (estimator.Advance), exact for a constant wheel ratio.
func squareRun(ccw bool, sideM, nominalB, trueB, scaleL, scaleR float64) [2]float64 {
	var truth, belief estimator.Pose
	step := func(dl, dr float64) {
		belief = estimator.Advance(belief, estimator.Step{ForwardM: (dl + dr) / 2, TurnRad: (dr - dl) / nominalB})
		tl, tr := dl*scaleL, dr*scaleR
		truth = estimator.Advance(truth, estimator.Step{ForwardM: (tl + tr) / 2, TurnRad: (tr - tl) / trueB})
	}
	turn := nominalB / 2 * math.Pi / 2 // each wheel's travel in a 90-degree turn in place
	if !ccw {
		turn = -turn
	}
	for range 4 {
		step(sideM, sideM)
		step(-turn, turn)
	}
	return [2]float64{truth.X - belief.X, truth.Y - belief.Y}
}

// TestUMBmarkRecoversGeometry: the closed-form corrections of the
// bidirectional square test (Borenstein and Feng 1996, "Measurement and
// correction of systematic odometry errors in mobile robots", IEEE Trans.
// Robotics and Automation 12(6); the formulas from memory, their signs
// derived in UMBmark's comment) recover the diameter ratio and the wheelbase
// injected into a noise-free simulated differential drive on the paper's
// 4 m square. The closed form is first order in the errors: one test
// recovers small errors within 0.1%; larger ones (a ratio of 1.01 and a
// wheelbase 2% off on a 0.4 m base: 0.1 rad per side) within 0.2% and 1.5%,
// and within 0.1% once the test is repeated with the corrections applied
// (three rounds), as a user would.
func TestUMBmarkRecoversGeometry(t *testing.T) {
	const side = 4.0
	for _, tc := range []struct {
		name         string
		b, ratio, eb float64 // nominal wheelbase, true D_R/D_L, true wheelbase factor
		rounds       int     // runs of the test, each on the robot corrected by the ones before
	}{
		{"ratio 1.001, wheelbase +0.5%", 0.4, 1.001, 1.005, 1},
		{"ratio 0.999, wheelbase -0.3%", 0.5, 0.999, 0.997, 1},
		{"ratio 1.01, wheelbase +2%", 0.4, 1.01, 1.02, 3},
		{"ratio 0.995, wheelbase -1.5%", 0.4, 0.995, 0.985, 3},
		{"ratio only", 0.5, 1.005, 1, 3},
		{"wheelbase only", 0.35, 1, 1.02, 3},
		{"none", 0.4, 1, 1, 1},
	} {
		t.Run(tc.name, func(t *testing.T) {
			sl, sr := 2/(tc.ratio+1), 2*tc.ratio/(tc.ratio+1) // mean 1, ratio sr/sl
			trueB := tc.b * tc.eb
			b, cl, cr := tc.b, 1.0, 1.0 // the robot's belief, corrected round by round
			for round := range tc.rounds {
				cw := squareRun(false, side, b, trueB, sl/cl, sr/cr)
				ccw := squareRun(true, side, b, trueB, sl/cl, sr/cr)
				c, err := UMBmark(cw, ccw, side, b)
				if err != nil {
					t.Fatal(err)
				}
				if math.Abs(c.ScaleLeft+c.ScaleRight-2) > 1e-12 {
					t.Errorf("scales %v and %v do not average 1", c.ScaleLeft, c.ScaleRight)
				}
				if round == 0 && tc.rounds > 1 {
					// Second order in the errors (beta about 0.1 rad here):
					// the ratio within 0.2%, the wheelbase within 1.5%.
					if math.Abs(c.DiameterRatio/tc.ratio-1) > 2e-3 {
						t.Errorf("first round: diameter ratio %.6f, want %.6f within 0.2%%", c.DiameterRatio, tc.ratio)
					}
					if math.Abs(c.WheelbaseM/trueB-1) > 0.015 {
						t.Errorf("first round: wheelbase %.6f m, want %.6f m within 1.5%%", c.WheelbaseM, trueB)
					}
				}
				b, cl, cr = c.WheelbaseM, cl*c.ScaleLeft, cr*c.ScaleRight
			}
			rel := func(name string, got, want float64) {
				if math.Abs(got/want-1) > 1e-3 {
					t.Errorf("%s %.6f, want %.6f within 0.1%%", name, got, want)
				}
			}
			rel("diameter ratio", cr/cl, tc.ratio)
			rel("scale left", cl, sl)
			rel("scale right", cr, sr)
			rel("wheelbase", b, trueB)
			// Corrected, the odometry closes both squares within a centimetre.
			cw := squareRun(false, side, b, trueB, sl/cl, sr/cr)
			ccw := squareRun(true, side, b, trueB, sl/cl, sr/cr)
			if e := math.Max(math.Hypot(cw[0], cw[1]), math.Hypot(ccw[0], ccw[1])); e > 0.01 {
				t.Errorf("corrected return errors %v, %v: %.3g m, want below 1 cm", cw, ccw, e)
			}
		})
	}
}

func TestUMBmarkRefuses(t *testing.T) {
	for _, tc := range []struct {
		name        string
		cw, ccw     [2]float64
		side, wheel float64
	}{
		{"no side", [2]float64{}, [2]float64{}, 0, 0.4},
		{"no wheelbase", [2]float64{}, [2]float64{}, 4, -1},
		{"not finite", [2]float64{math.NaN(), 0}, [2]float64{}, 4, 0.4},
		{"arc inside the wheelbase", [2]float64{-16, 0}, [2]float64{16, 0}, 4, 5},
		{"beyond the closed form", [2]float64{-30, 0}, [2]float64{-30, 0}, 4, 0.4},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if _, err := UMBmark(tc.cw, tc.ccw, tc.side, tc.wheel); !errors.Is(err, ErrSquareTest) {
				t.Errorf("error %v, want ErrSquareTest", err)
			}
		})
	}
}
