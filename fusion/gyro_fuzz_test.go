package fusion

import (
	"errors"
	"math"
	"testing"

	"reckon.example/estimator"
)

// FuzzGyroScale: any calibration.gyro_scale_std and IMU variance either
// make a robot or are refused with ErrConfig, and a robot made takes spins
// either way with IMU headings of any stated variance and gated or not,
// fixes among them and a snapshot restored mid-way, without a panic, with
// a finite estimate, and the restored robot answers as the original (the
// invariants the other fuzz targets keep; DEVELOPERS.md, "Design: State").
func FuzzGyroScale(f *testing.F) {
	f.Add(0.03, 2.5e-5, 1.2, 0.02, false)
	f.Add(0.5, 1e-12, 20.0, -0.3, true)
	f.Add(1e-300, 1.0, -3.0, 0.0, false)
	f.Fuzz(func(t *testing.T, gyroStd, imuVar, rate, scale float64, gate bool) {
		cfg := threeWheels()
		cfg.Calibration.GyroScaleStd = gyroStd
		cfg.Noise.IMUHeadingVarRad2 = imuVar
		cfg.GateIMU = gate
		r, err := New(cfg)
		if err != nil {
			if !errors.Is(err, ErrConfig) {
				t.Fatalf("refused without ErrConfig: %v", err)
			}
			return
		}
		if !finiteAll(rate, scale) || math.Abs(rate) > 20 || math.Abs(scale) > 0.5 {
			return
		}
		const track = 0.24
		var b *Robot
		var th float64
		for k := int64(0); k < 200; k++ {
			turn := rate * 5e-3
			th += turn
			o := Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: []float64{-track / 2 * turn, track / 2 * turn, -0.08 * turn}}
			h := Heading{StampNs: (k+1)*5e6 - 1e6, HeadingRad: estimator.Wrap((1 + scale) * th)}
			fx := Fix{SensorID: "heading", StampNs: k*5e6 - 3e6, Kind: FixHeading, HeadingRad: estimator.Wrap(th), Cov: []float64{1e-3}}
			for _, rr := range []*Robot{r, b} {
				if rr == nil {
					continue
				}
				rr.AddOdometry(o)
				if k%2 == 1 {
					rr.AddHeading(h)
				}
				if k%25 == 10 {
					rr.AddFix(fx)
				}
			}
			if k == 100 {
				snap, err := r.Snapshot()
				if err != nil {
					t.Fatalf("snapshot: %v", err)
				}
				if b, err = RestoreSnapshot(cfg, snap); err != nil {
					t.Fatalf("restore: %v", err)
				}
			}
		}
		p := r.Pose()
		if v := []float64{p.Pose.X, p.Pose.Y, p.Pose.Heading, p.Cov[0], p.Cov[4], p.Cov[8]}; !finiteAll(v...) {
			t.Fatalf("estimate not finite: %+v", p)
		}
		if q := b.Pose(); q != p {
			t.Fatalf("restored robot %+v, original %+v", q, p)
		}
	})
}
