package calib

import (
	"math"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// TestCountsIntervalsAcrossBodySteps: the calibration reads a run that
// switches from encoder counts to 0.3 s of body steps (or of wheel
// travels) and back as the robot does (fusion's
// TestCountsAcrossBodySteps): the first counts sample after them is the
// counts' new reference and gives no interval, so that the intervals
// follow one another without overlap and each counts interval holds the
// wheels' travel over its own 10 ms (a differential drive on an arc at
// 0.1 m/s and 0.2 rad/s, wheels 0.4 m apart, 10^7 counts a metre: exact
// to 1e-6 m). Before, that sample's interval ran from the last counts
// sample before the steps, over their 0.3 s: the dead reckoning took
// their travel twice.
func TestCountsIntervalsAcrossBodySteps(t *testing.T) {
	const dtNs, v, w = int64(10e6), 0.1, 0.2
	const dt = float64(dtNs) * 1e-9
	for _, imu := range []fusion.IMUMode{fusion.IMUNone, fusion.IMURotation} {
		for _, travel := range []bool{false, true} {
			r, err := fusion.New(fusion.Config{Wheels: []fusion.Wheel{{YM: 0.2, CountsPerM: 1e7}, {YM: -0.2, CountsPerM: 1e7}}, IMU: imu, NoSideSlip: true})
			if err != nil {
				t.Fatal(err)
			}
			cfg := r.Config() // with its defaults (the speed limit)
			// A wheel at (0, py) rolling forward reads a - py dth
			// (DEVELOPERS.md, "Design: Motion prediction").
			wheelAt := func(i int, s float64) float64 { return (v - cfg.Wheels[i].YM*w) * s }
			var odo []fusion.Odometry
			for k := int64(0); k <= 230; k++ {
				s := float64(k) * dt
				o := fusion.Odometry{StartNs: (k - 1) * dtNs, StampNs: k * dtNs}
				z := w * s
				switch {
				case k <= 100 || k > 130:
					o.Counts = make([]int64, 2)
					for i, wh := range cfg.Wheels {
						o.Counts[i] = int64(math.Round(wheelAt(i, s) * wh.CountsPerM))
					}
					if imu == fusion.IMURotation {
						o.IMUHeadingRad = &z
					}
				case travel:
					o.TravelM = []float64{wheelAt(0, dt), wheelAt(1, dt)}
					if imu == fusion.IMURotation {
						o.IMUHeadingRad = &z
					}
				default:
					o.Step = &estimator.Step{ForwardM: v * dt, TurnRad: w * dt}
				}
				odo = append(odo, o)
			}
			m := &sysModel{cfg: &cfg, nw: len(cfg.Wheels), rotation: imu == fusion.IMURotation}
			if err := m.intervals(Samples(odo)); err != nil {
				t.Fatal(err)
			}
			last := int64(math.MinInt64)
			for _, iv := range m.ivs {
				if iv.t0 < last {
					t.Errorf("imu %s, travels %v: interval [%d, %d] overlaps the one before, which ends at %d", imu, travel, iv.t0, iv.t1, last)
				}
				last = iv.t1
				if iv.t1-iv.t0 != dtNs {
					t.Errorf("imu %s, travels %v: interval [%d, %d], want 10 ms", imu, travel, iv.t0, iv.t1)
				}
				if iv.isStep {
					continue
				}
				for i := range cfg.Wheels {
					if got := m.travel[int(iv.off)+i]; math.Abs(got-wheelAt(i, dt)) > 1e-6 {
						t.Errorf("imu %s, travels %v: interval [%d, %d]: wheel %d travel %v, want %v", imu, travel, iv.t0, iv.t1, i, got, wheelAt(i, dt))
					}
				}
			}
			// 231 samples less the run's first (the reference) and the
			// first counts sample after the steps.
			if len(m.ivs) != 229 {
				t.Errorf("imu %s, travels %v: %d intervals, want 229", imu, travel, len(m.ivs))
			}
		}
	}
}
