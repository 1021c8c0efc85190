package fusion

import (
	"encoding/binary"
	"math"
	"testing"

	"reckon.example/estimator"
)

// reader hands out fuzz bytes as numbers, zeros when they run out.
type reader struct{ b []byte }

func (r *reader) byte() byte {
	if len(r.b) == 0 {
		return 0
	}
	v := r.b[0]
	r.b = r.b[1:]
	return v
}

func (r *reader) f64() float64 {
	if len(r.b) < 8 {
		r.b = nil
		return 0
	}
	v := math.Float64frombits(binary.LittleEndian.Uint64(r.b))
	r.b = r.b[8:]
	return v
}

// i64 returns the next 8 bytes as an int64 (0 when they run out).
func (r *reader) i64() int64 {
	if len(r.b) < 8 {
		r.b = nil
		return 0
	}
	v := int64(binary.LittleEndian.Uint64(r.b))
	r.b = r.b[8:]
	return v
}

// small returns a plausible number most of the time and raw bits otherwise.
func (r *reader) small() float64 {
	if k := r.byte(); k < 200 {
		return (float64(k) - 100) / 1000
	}
	return r.f64()
}

// FuzzSamples drives a robot with an arbitrary sequence of odometry, IMU,
// fixes, reseeds and queries. The oracle is the invariants: no panic; the
// state stays finite with a symmetric positive-definite covariance; a refused
// input changes nothing.
func FuzzSamples(f *testing.F) {
	f.Add([]byte{0, 5, 10, 20, 0, 1, 3, 50, 0, 2, 4, 100, 100, 3, 2, 0, 5, 5})
	f.Add([]byte{0, 5, 1, 1, 1, 2, 250, 1, 2, 3, 4, 5, 6, 7, 8, 0, 255, 255, 255})
	f.Add([]byte{4, 0, 0, 1, 9, 9, 9, 2, 200, 3, 0, 1, 1, 0, 0, 6, 7})
	// Odometry a century ahead, then a body step int64's largest value
	// ahead (its stamp wraps: time backwards).
	f.Add([]byte{0, 1, 0, 25, 10, 20, 30, 1, 0, 255, 0, 0, 0x9c, 0x6b, 0x38, 0x3a, 0xd6, 0x2b, 10, 20, 30, 1, 7, 255, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0xff, 0x7f, 1, 2, 3})
	f.Fuzz(func(t *testing.T, data []byte) { fuzzSamples(t, data) })
}

func fuzzSamples(t *testing.T, data []byte) {
	{
		in := &reader{b: data}
		cfg := threeWheels()
		switch in.byte() % 4 {
		case 1: // one forward and one lateral wheel, IMU as the turn row
			cfg.Wheels = cfg.Wheels[1:]
			cfg.IMU = IMURotation
		case 2:
			cfg.IMU = IMUNone
			cfg.NoSideSlip = true
		case 3: // a robot that sends body steps
			cfg.Wheels = nil
		}
		if in.byte()%2 == 0 {
			// Every option of the sensors section and the calibration.
			cfg.Calibration = Calibration{Scale: true, RateBias: true, ForwardScaleVarPerM: 1e-6}
			cfg.Sensors[0] = Sensor{ID: "pose", Kind: FixPose, Cov: []float64{1e-3, 0, 0, 0, 1e-3, 0, 0, 0, 1e-3},
				CorrelationTimeS: 1, CorrelatedFraction: 0.5, Robust: RobustHuber, LatencyNs: 20e6}
			cfg.Sensors[3] = Sensor{ID: "landmark", Kind: FixLandmark, Cov: []float64{1e-3, 0, 0, 1e-3},
				CorrelationTimeS: 2, CorrelatedFraction: 0.3, Robust: RobustStudentT}
			cfg.Noise.StepForwardVarM2PerS = 1e-5
		}
		cfg.Recovery.Enabled = true
		cfg.MaxHeld = 8
		r, err := New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		nw := len(cfg.Wheels)
		var stamp int64
		for steps := 0; len(in.b) > 0 && steps < 200; steps++ {
			op := in.byte() % 8
			dt := (int64(in.byte()) - 20) * 1e6
			if dt == 235e6 {
				// Any step in time, as far as int64's range: stamps
				// ahead by a century, or wrapped around.
				dt = in.i64()
			}
			before := snap(r)
			var res Result
			switch op {
			case 0, 1:
				tr := []float64{in.small(), in.small(), in.small()}[:nw]
				var h *float64
				if in.byte()%2 == 0 {
					h = ptr(in.small() * 5)
				}
				res = r.AddOdometry(Odometry{StartNs: stamp, StampNs: stamp + dt, TravelM: tr, IMUHeadingRad: h})
				if res.Verdict == VerdictApplied {
					stamp += dt
				}
			case 2:
				res = r.AddHeading(Heading{StampNs: stamp + dt, HeadingRad: in.small() * 10, VarRad2: math.Abs(in.small())})
			case 3:
				k := FixKind(in.byte()%5 + 1)
				res = r.AddFix(Fix{SensorID: k.String(), StampNs: stamp + dt, Kind: k, XM: in.small() * 100, YM: in.small(), HeadingRad: in.small(),
					LandmarkID: "post-1", RangeM: ptr(in.small() * 10), Cov: []float64{math.Abs(in.small()) + 1e-4, 0, 0, 0, 0.01, 0, 0, 0, 0.01}[:in.byte()%10]})
			case 4:
				res = r.Reseed(stamp+dt, estimator.Pose{X: in.small(), Y: in.small(), Heading: in.small()}, []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, math.Abs(in.small()) + 1e-6})
			case 5:
				res = r.AddOdometry(Odometry{StampNs: stamp + dt, Counts: []int64{int64(in.byte()), int64(in.byte()) * 300, int64(in.byte())}[:nw]})
				if res.Verdict == VerdictApplied {
					stamp += dt
				}
			case 7:
				res = r.AddOdometry(Odometry{StartNs: stamp, StampNs: stamp + dt, Step: &estimator.Step{ForwardM: in.small(), LeftM: in.small(), TurnRad: in.small()}})
				if res.Verdict == VerdictApplied {
					stamp += dt
				}
			case 6:
				if in.byte()%4 == 0 {
					// A controller restart: a run start (the boot id and
					// number may be the current ones: refused), then the
					// new clock from 0.
					run := r.Run()
					res = r.StartRun(RunStart{BootID: string('a' + rune(in.byte()%3)), Run: uint64(in.byte() % 4)})
					if res.Verdict == VerdictApplied {
						if r.Run() != run+1 {
							t.Fatalf("run %d after a run start in run %d", r.Run(), run)
						}
						stamp = 0
					}
					break
				}
				p, err := r.PoseAt(stamp + dt)
				if err == nil && (math.IsNaN(p.Pose.X) || math.IsNaN(p.Cov[0])) {
					t.Fatalf("PoseAt gave NaN: %+v", p)
				}
				sameSnapshot(t, "PoseAt", before, snap(r))
				continue
			}
			if res.Verdict == VerdictInvalid && res.Err == nil {
				t.Fatalf("invalid without a reason")
			}
			if (res.Verdict == VerdictInvalid || res.Verdict == VerdictTooOld) && op != 5 {
				sameSnapshot(t, "a refused input", before, snap(r))
			}
			checkFinitePD(t, r)
		}
	}
}

func ptr(v float64) *float64 { return &v }
