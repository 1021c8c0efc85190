package calib

import (
	"math"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// TestRotationIntervalsAcrossBodySteps: in imu_mode rotation the
// calibration reads each wheel interval's IMU turn as the robot does: over
// the interval alone. A cart spinning at 1 rad/s sends 0.1 s of body steps
// without the IMU's heading between wheel samples with it; every wheel
// interval's IMU turn is the truth's, 0.01 rad, to 1e-12 (the heading
// differences of the spin, exact), and the sample after the steps, with no
// heading to turn from, gives none. Before, that sample's IMU turn ran from
// the heading before the steps, 0.11 rad.
func TestRotationIntervalsAcrossBodySteps(t *testing.T) {
	cfg := fusion.Config{Wheels: []fusion.Wheel{{YM: 0.1}, {XM: -0.08, DirectionRad: math.Pi / 2}}, IMU: fusion.IMURotation}
	const rate, dt = 1.0, 0.01
	var odo []fusion.Odometry
	for k := int64(1); k <= 100; k++ {
		t1 := k * 10e6
		o := fusion.Odometry{StartNs: t1 - 10e6, StampNs: t1}
		if k >= 50 && k < 60 {
			o.Step = &estimator.Step{TurnRad: rate * dt}
		} else {
			z := estimator.Wrap(rate * float64(t1) * 1e-9)
			o.IMUHeadingRad = &z
			o.TravelM = []float64{-0.1 * rate * dt, -0.08 * rate * dt}
		}
		odo = append(odo, o)
	}
	m := &sysModel{cfg: &cfg, nw: len(cfg.Wheels), rotation: true}
	if err := m.intervals(Samples(odo)); err != nil {
		t.Fatal(err)
	}
	wheel := 0
	for _, iv := range m.ivs {
		if iv.isStep {
			continue
		}
		wheel++
		if iv.t1 == 60*10e6 {
			t.Errorf("the wheel sample after the body steps gave an interval, IMU turn %v", iv.imu)
			continue
		}
		if math.Abs(iv.imu-rate*dt) > 1e-12 {
			t.Errorf("interval [%d, %d]: IMU turn %v, want %v", iv.t0, iv.t1, iv.imu, rate*dt)
		}
	}
	// 90 wheel samples, less the first (the reference) and the one after
	// the steps.
	if wheel != 88 {
		t.Errorf("%d wheel intervals, want 88", wheel)
	}
}
