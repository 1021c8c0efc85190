package fusion

import "gonum.org/v1/gonum/mat"

// countsTurnVar returns the variance, rad^2, that the quantisation of the
// wheels' latest counts gives the turn they report since any earlier
// moment (DEVELOPERS.md, "Design: Process noise", the coarse encoders):
// a wheel counting c counts a metre stands, at any moment, a fraction of a
// count past what its count says, uniform over a count when the robot has
// rolled a few counts (variance 1/(12 c^2), common practice for a floored
// reading), and independently of the other wheels. The counts are
// cumulative, so this error does not add up along the way: the counted
// heading is off the true one by the latest residuals' turn alone, which
// the wheels' least-squares gain G gives: sum_i G[turn][i]^2 / (12 c_i^2)
// (Bar-Shalom, Li and Kirubarajan 2001, sec. 3.4: a linear estimator's
// covariance). The gain is the solve's for equal travels (the wheels'
// weights all scale with travel, and the no-side-slip row's with their
// mean), so for a differential drive, whose rows determine the step
// exactly, it is exact. 0 without counting wheels, and in imu_mode
// rotation, where the IMU, not the wheels, reports the turn.
func (c *Config) countsTurnVar() float64 {
	if c.IMU == IMURotation {
		return 0
	}
	counting := false
	for _, w := range c.Wheels {
		counting = counting || w.CountsPerM > 0
	}
	if !counting {
		return 0
	}
	k := len(c.Wheels)
	rows := c.layoutRows()
	a := mat.NewDense(len(rows), 3, nil)
	wt := make([]float64, len(rows))
	for i, row := range rows {
		a.SetRow(i, row[:])
		v := c.Noise.WheelVarM2PerM
		if i >= k {
			v = c.Noise.LateralSlipVarM2PerM // the no-side-slip row
		}
		wt[i] = 1 / (v + weightFloor)
	}
	n := mat.NewDense(3, 3, nil) // A^T W A
	for i := range rows {
		for p := range 3 {
			for q := range 3 {
				n.Set(p, q, n.At(p, q)+wt[i]*a.At(i, p)*a.At(i, q))
			}
		}
	}
	var inv mat.Dense
	if err := inv.Inverse(n); err != nil {
		return 0 // checkLayout has refused such a layout
	}
	var sum float64
	for i, w := range c.Wheels {
		if w.CountsPerM <= 0 {
			continue
		}
		// The turn's gain on wheel i: (N^-1 a_i w_i)[turn].
		g := wt[i] * (inv.At(2, 0)*a.At(i, 0) + inv.At(2, 1)*a.At(i, 1) + inv.At(2, 2)*a.At(i, 2))
		sum += g * g / (12 * w.CountsPerM * w.CountsPerM)
	}
	return sum
}
