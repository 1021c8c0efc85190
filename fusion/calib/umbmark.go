package calib

import (
	"errors"
	"fmt"
	"math"
)

// ErrSquareTest marks every error of the bidirectional square test.
var ErrSquareTest = errors.New("square test")

// Correction is the outcome of the bidirectional square test for a
// differential drive: the two systematic errors and the corrections that
// remove them.
//
// Conventions (those of UMBmark's derivation below): the robot starts at the
// origin heading along +x, x forward and y to the left; the clockwise run
// turns right at each corner, the counter-clockwise run turns left; a return
// error is the true stopping position less the one the odometry computed
// (metres). The left wheel is at +y, the right at -y.
type Correction struct {
	// AlphaRad is the type A error: how much each nominal 90-degree turn in
	// place falls short (positive: the robot turns less than it believes),
	// from the wheelbase error.
	AlphaRad float64
	// BetaRad is the type B error: how much the heading turns left (positive)
	// on each straight side, from unequal wheel diameters.
	BetaRad float64
	// RadiusM is the radius of the arc the robot drives on a side it
	// believes straight (positive: to the left; +Inf for beta 0).
	RadiusM float64
	// DiameterRatio is E_d, the right wheel's effective diameter over the
	// left's.
	DiameterRatio float64
	// WheelbaseFactor is E_b, the actual wheelbase over the nominal.
	WheelbaseFactor float64
	// ScaleLeft and ScaleRight multiply each wheel's nominal travel (its
	// counts per metre divide by them); their mean is 1, so that the
	// distance driven is unchanged.
	ScaleLeft, ScaleRight float64
	// WheelbaseM is the corrected wheelbase in metres.
	WheelbaseM float64
}

// UMBmark returns the corrections of the bidirectional square test
// (Borenstein and Feng, "Measurement and correction of systematic odometry
// errors in mobile robots", IEEE Transactions on Robotics and Automation
// 12(6), 1996) from the centroids cw and ccw (x, y in metres) of the return
// errors of the clockwise and counter-clockwise runs round a square of side
// sideM, for a differential drive of nominal wheelbase wheelbaseM.
//
// Derivation (small angles; it gives the paper's formulas, recalled from
// memory, in the conventions of Correction). A side of length L driven with
// heading error e starts off by e + beta/2 and ends with e + beta; a turn
// adds -alpha on the counter-clockwise run (a left turn falls short) and
// +alpha on the clockwise run. Summing the four sides' displacements:
//
//	ccw: x = 2L(beta - alpha),  y = -2L(beta - alpha)
//	cw:  x = -2L(beta + alpha), y = -2L(beta + alpha)
//
// hence alpha = (x_cw + x_ccw)/(-4L) and beta = (x_cw - x_ccw)/(-4L), as in
// the paper. On a side the robot drives an arc of chord L turning beta, of
// radius R = (L/2)/sin(beta/2); its wheels, b apart, roll R + b/2 and
// R - b/2, so E_d = (R + b/2)/(R - b/2). A turn the robot believes to be
// 90 degrees is 90 - alpha, so the wheelbase is E_b = 90/(90 - alpha) times
// the nominal. The scales with mean 1 and ratio E_d are
// c_l = 2/(E_d + 1) and c_r = 2/(1/E_d + 1) (the paper writes the same pair;
// which wheel takes which depends on its axes). The y errors carry the same
// information and are not used, as in the paper.
func UMBmark(cw, ccw [2]float64, sideM, wheelbaseM float64) (Correction, error) {
	for _, v := range []float64{cw[0], cw[1], ccw[0], ccw[1], sideM, wheelbaseM} {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return Correction{}, fmt.Errorf("%w: input %v is not finite", ErrSquareTest, v)
		}
	}
	if sideM <= 0 || wheelbaseM <= 0 {
		return Correction{}, fmt.Errorf("%w: side %g m and wheelbase %g m must be positive", ErrSquareTest, sideM, wheelbaseM)
	}
	c := Correction{
		AlphaRad: (cw[0] + ccw[0]) / (-4 * sideM),
		BetaRad:  (cw[0] - ccw[0]) / (-4 * sideM),
	}
	if math.Abs(c.AlphaRad) >= math.Pi/2 || math.Abs(c.BetaRad) >= math.Pi {
		return Correction{}, fmt.Errorf("%w: errors alpha %.3g rad, beta %.3g rad are too large for the closed form", ErrSquareTest, c.AlphaRad, c.BetaRad)
	}
	c.WheelbaseFactor = (math.Pi / 2) / (math.Pi/2 - c.AlphaRad)
	c.WheelbaseM = c.WheelbaseFactor * wheelbaseM
	c.DiameterRatio, c.RadiusM = 1, math.Inf(1)
	if c.BetaRad != 0 {
		c.RadiusM = (sideM / 2) / math.Sin(c.BetaRad/2)
		half := wheelbaseM / 2
		if math.Abs(c.RadiusM) <= half {
			return Correction{}, fmt.Errorf("%w: arc radius %.3g m is inside the wheelbase %g m", ErrSquareTest, c.RadiusM, wheelbaseM)
		}
		c.DiameterRatio = (c.RadiusM + half) / (c.RadiusM - half)
	}
	c.ScaleLeft = 2 / (c.DiameterRatio + 1)
	c.ScaleRight = 2 / (1/c.DiameterRatio + 1)
	return c, nil
}
