package fusion

import (
	"math"
	"testing"

	"reckon.example/estimator"
)

// FuzzConfigValues: a configuration's numbers at any value New takes (a
// journal may hold one the service's bounds would refuse now) make a
// robot that takes a run of wheel odometry, IMU headings and fixes
// without a panic, and whose estimate stays finite. One CreateRobot with
// a gate probability of 5e-324 panicked in New and ended the service (the
// probe of session 26); FuzzConfigYAML reaches such values only through
// YAML, rarely.
func FuzzConfigValues(f *testing.F) {
	f.Add(0.99, 0.999, 0.999, 1e-5, 1e-4, 1e-5, 1e-6, 1e-5, 0.12, -0.12, -0.08, 1000.0, int64(1e9), int64(1e9), int64(250e6), uint16(20), uint16(256), 0.02, uint8(0))
	f.Add(5e-324, 0.5, 1e-300, 1e300, 0.0, 1e-300, 1e30, 0.0, 0.0, 0.0, 0.0, 1e-9, int64(1), int64(-1), int64(math.MaxInt64), uint16(0), uint16(1), 1e9, uint8(255))
	f.Fuzz(func(t *testing.T, gate, agree, consist, wheelVar, turnVar, imuVar, offS, offR, yL, yR, xLat, cpm float64,
		window, holdAhead, extrap int64, nisWin, maxHeld uint16, scaleStd float64, flags uint8) {
		cfg := threeWheels()
		cfg.GateProbability, cfg.Recovery.AgreeProbability, cfg.Trust.ConsistencyProbability = gate, agree, consist
		cfg.Noise.WheelVarM2PerM, cfg.Noise.TurnVarRad2PerRad = wheelVar, turnVar
		cfg.Noise.IMUHeadingVarRad2, cfg.Noise.IMUOffsetVarRad2PerS, cfg.Noise.IMUOffsetVarRad2PerRad = imuVar, offS, offR
		cfg.Wheels[0].YM, cfg.Wheels[1].YM, cfg.Wheels[2].XM = yL, yR, xLat
		for i := range cfg.Wheels {
			cfg.Wheels[i].CountsPerM = cpm
		}
		cfg.WindowNs, cfg.MaxHoldAheadNs, cfg.MaxExtrapolationNs = window, holdAhead, extrap
		cfg.Trust.NISWindow, cfg.MaxHeld = int(nisWin), int(maxHeld)
		cfg.Calibration = Calibration{Scale: flags&1 != 0, ScaleStd: scaleStd, RateBias: flags&2 != 0}
		cfg.GateIMU, cfg.Recovery.Enabled, cfg.NoSideSlip = flags&4 != 0, flags&8 != 0, flags&16 != 0
		if flags&32 != 0 {
			cfg.IMU = IMURotation
		}
		for i := range cfg.Sensors {
			cfg.Sensors[i].Robust = RobustLoss(flags >> 6)
		}
		r, err := New(cfg)
		if err != nil {
			return
		}
		for k := int64(0); k < 120; k++ {
			const fwd, turn = 0.002, 0.002
			heading := estimator.Wrap(0.4 * float64(k+1) * 5e-3)
			o := Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: []float64{fwd - 0.12*turn, fwd + 0.12*turn, -0.08 * turn}}
			if cfg.IMU == IMURotation {
				o.IMUHeadingRad = &heading
			}
			r.AddOdometry(o)
			if k%2 == 1 && cfg.IMU == IMUAbsolute {
				r.AddHeading(Heading{StampNs: (k+1)*5e6 - 1e6, HeadingRad: heading})
			}
			if k%20 == 10 {
				r.AddFix(Fix{SensorID: "position", StampNs: k * 5e6, Kind: FixPosition, XM: float64(k) * 0.002, YM: 0.01, Cov: []float64{0.01, 0, 0, 0.01}})
				r.AddFix(Fix{SensorID: "pose", StampNs: k*5e6 - 3e6, Kind: FixPose, XM: float64(k) * 0.002, YM: 0.01, HeadingRad: heading, Cov: []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.001}})
			}
		}
		p := r.Pose()
		if v := []float64{p.Pose.X, p.Pose.Y, p.Pose.Heading, p.Cov[0], p.Cov[4], p.Cov[8]}; !finiteAll(v...) {
			t.Fatalf("estimate not finite: %+v", p)
		}
		if _, err := r.Snapshot(); err != nil {
			t.Fatalf("snapshot: %v", err)
		}
	})
}
