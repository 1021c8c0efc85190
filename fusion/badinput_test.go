package fusion

import (
	"errors"
	"fmt"
	"math"
	"strings"
	"testing"

	"reckon.example/estimator"
)

func threeWheels() Config {
	return Config{
		Wheels:    []Wheel{{YM: 0.12, CountsPerM: 1000, CounterBits: 16}, {YM: -0.12, CountsPerM: 1000, CounterBits: 16}, {XM: -0.08, DirectionRad: math.Pi / 2, CountsPerM: 1000, CounterBits: 16}},
		IMU:       IMUAbsolute,
		Landmarks: []Landmark{{ID: "post-1", XM: 3, YM: 1}},
		Sensors:   kindSensors(),
	}
}

// kindSensors returns one sensor per fix kind, named by the kind's label.
func kindSensors() []Sensor {
	var out []Sensor
	for _, l := range FixKindLabels() {
		out = append(out, Sensor{ID: l.Name, Kind: l.Value})
	}
	return out
}

// busyRobot returns a robot with a full window, a held fix and an
// initialised IMU offset.
func busyRobot(t *testing.T) *Robot {
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	for k := int64(0); k < 300; k++ {
		res := r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: []float64{0.002, 0.0021, 0.0001}})
		if res.Verdict != VerdictApplied {
			t.Fatal(res.Err)
		}
		if k%2 == 0 {
			r.AddHeading(Heading{StampNs: k*5e6 + 2e6, HeadingRad: 0.3 + float64(k)*0.00004})
		}
		if k%20 == 0 {
			r.AddFix(Fix{SensorID: "position", StampNs: k * 5e6, Kind: FixPosition, XM: float64(k) * 0.002, YM: 0, Cov: []float64{0.01, 0, 0, 0.01}})
		}
	}
	if res := r.AddFix(Fix{SensorID: "heading", StampNs: 301 * 5e6, Kind: FixHeading, HeadingRad: 0.03, Cov: []float64{0.01}}); res.Verdict != VerdictHeld {
		t.Fatalf("future fix: %v", res.Verdict)
	}
	return r
}

// TestBadInputChangesNothing: every kind of bad input is refused with an
// error that names what was wrong, and the robot is exactly as it was.
func TestBadInputChangesNothing(t *testing.T) {
	nan := math.NaN()
	inf := math.Inf(1)
	f := func(v float64) *float64 { return &v }
	newest := int64(300 * 5e6)
	cases := []struct {
		name    string
		do      func(r *Robot) Result
		want    error
		verdict Verdict
	}{
		{"NaN travel", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{nan, 0, 0}})
		}, ErrBadSample, VerdictInvalid},
		{"infinite travel", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0, inf, 0}})
		}, ErrBadSample, VerdictInvalid},
		{"wrong wheel count", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0, 0}})
		}, ErrBadSample, VerdictInvalid},
		{"two kinds at once", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0, 0, 0}, Step: &estimator.Step{}})
		}, ErrBadSample, VerdictInvalid},
		{"stamp backwards", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest - 10e6, StampNs: newest - 5e6, TravelM: []float64{0, 0, 0}})
		}, ErrTimeBackwards, VerdictInvalid},
		{"overlapping interval", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest - 1e6, StampNs: newest + 5e6, TravelM: []float64{0, 0, 0}})
		}, ErrTimeBackwards, VerdictInvalid},
		{"empty interval", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest + 5e6, StampNs: newest + 5e6, TravelM: []float64{0, 0, 0}})
		}, ErrTimeBackwards, VerdictInvalid},
		{"stamp a century ahead", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 100*365*86400e9, TravelM: []float64{0.002, 0.0021, 0.0001}})
		}, ErrTooFarAhead, VerdictInvalid},
		{"largest stamp", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: math.MaxInt64 - 5e6, StampNs: math.MaxInt64, TravelM: []float64{0, 0, 0}})
		}, ErrTooFarAhead, VerdictInvalid},
		{"interval of int64's whole range", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: math.MaxInt64, TravelM: []float64{0, 0, 0}})
		}, ErrTooFarAhead, VerdictInvalid},
		{"smallest stamp", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: math.MinInt64, StampNs: math.MinInt64 + 5e6, TravelM: []float64{0, 0, 0}})
		}, ErrTimeBackwards, VerdictInvalid},
		{"absurd jump", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{3, 3, 0}})
		}, ErrAbsurdJump, VerdictInvalid},
		{"absurd turn", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0.3, -0.3, 0}})
		}, ErrAbsurdJump, VerdictInvalid},
		{"NaN IMU on odometry", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0, 0, 0}, IMUHeadingRad: f(nan)})
		}, ErrBadSample, VerdictInvalid},
		{"NaN step", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, Step: &estimator.Step{ForwardM: nan}})
		}, ErrBadSample, VerdictInvalid},
		{"NaN heading", func(r *Robot) Result { return r.AddHeading(Heading{StampNs: newest - 1e6, HeadingRad: nan}) }, ErrBadSample, VerdictInvalid},
		// Angles a float64 cannot place within their turn: taken, 1e300
		// wrapped to an arbitrary heading that the (ungated) IMU applied.
		{"heading of 1e300 rad", func(r *Robot) Result { return r.AddHeading(Heading{StampNs: newest - 1e6, HeadingRad: 1e300}) }, ErrBadSample, VerdictInvalid},
		{"IMU heading on odometry of -1e7 rad", func(r *Robot) Result {
			return r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0, 0, 0}, IMUHeadingRad: f(-1e7)})
		}, ErrBadSample, VerdictInvalid},
		{"pose fix heading of 1e9 rad", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "pose", StampNs: newest - 100e6, Kind: FixPose, HeadingRad: 1e9, Cov: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}})
		}, ErrBadSample, VerdictInvalid},
		{"heading fix of 1e9 rad", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "heading", StampNs: newest - 100e6, Kind: FixHeading, HeadingRad: 1e9, Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"re-seed heading of 1e300 rad", func(r *Robot) Result {
			return r.Reseed(newest-100e6, estimator.Pose{Heading: 1e300}, []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.01})
		}, ErrBadSample, VerdictInvalid},
		{"fix mount heading of 1e300 rad", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "position", StampNs: newest - 100e6, Kind: FixPosition, Mount: &estimator.Pose{Heading: 1e300}, Cov: []float64{0.01, 0, 0, 0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"bearing of 1e300 rad", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-1", BearingRad: f(1e300), Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"negative heading variance", func(r *Robot) Result {
			return r.AddHeading(Heading{StampNs: newest - 1e6, HeadingRad: 0.3, VarRad2: -1})
		}, ErrBadSample, VerdictInvalid},
		{"NaN fix", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "pose", StampNs: newest - 100e6, Kind: FixPose, XM: nan, Cov: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}})
		}, ErrBadSample, VerdictInvalid},
		{"fix cov wrong size", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "pose", StampNs: newest - 100e6, Kind: FixPose, Cov: []float64{1, 0, 0, 1}})
		}, ErrBadSample, VerdictInvalid},
		{"fix cov not positive definite", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "position", StampNs: newest - 100e6, Kind: FixPosition, Cov: []float64{1, 2, 2, 1}})
		}, ErrBadSample, VerdictInvalid},
		{"fix cov asymmetric", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "position", StampNs: newest - 100e6, Kind: FixPosition, Cov: []float64{1, 0.5, 0.2, 1}})
		}, ErrBadSample, VerdictInvalid},
		{"fix cov NaN", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "heading", StampNs: newest - 100e6, Kind: FixHeading, Cov: []float64{nan}})
		}, ErrBadSample, VerdictInvalid},
		{"unknown landmark", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-9", RangeM: f(2), Cov: []float64{0.01}})
		}, ErrUnknownLandmark, VerdictInvalid},
		{"landmark without range or bearing", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-1", Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"landmark fix naming a marker", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-1", Marker: "post-1", RangeM: f(2), Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"negative range", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-1", RangeM: f(-2), Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"landmark at the sensor", func(r *Robot) Result {
			st, _ := r.PoseAt(newest - 100e6)
			s, c := math.Sincos(st.Pose.Heading)
			dx, dy := 3-st.Pose.X, 1-st.Pose.Y
			m := estimator.Pose{X: c*dx + s*dy, Y: -s*dx + c*dy}
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-1", Mount: &m, RangeM: f(1), Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"unknown sensor", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "lidar", StampNs: newest - 1e6, Kind: FixHeading, Cov: []float64{0.01}})
		}, ErrUnknownSensor, VerdictInvalid},
		{"no sensor", func(r *Robot) Result {
			return r.AddFix(Fix{StampNs: newest - 1e6, Kind: FixHeading, Cov: []float64{0.01}})
		}, ErrUnknownSensor, VerdictInvalid},
		{"sensor of another kind", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "pose", StampNs: newest - 1e6, Kind: FixHeading, Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"no covariance from fix or sensor", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "heading", StampNs: newest - 1e6, Kind: FixHeading})
		}, ErrBadSample, VerdictInvalid},
		{"unknown fix kind", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "pose", StampNs: newest - 1e6, Kind: 42, Cov: []float64{1}})
		}, ErrBadSample, VerdictInvalid},
		{"fix too old", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "heading", StampNs: 10e6, Kind: FixHeading, HeadingRad: 0, Cov: []float64{0.01}})
		}, ErrTooOld, VerdictTooOld},
		{"fix too far ahead", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "heading", StampNs: newest + 5e9, Kind: FixHeading, Cov: []float64{0.01}})
		}, ErrTooFarAhead, VerdictInvalid},
		{"reseed NaN", func(r *Robot) Result {
			return r.Reseed(newest-1e6, estimator.Pose{X: nan}, []float64{1, 0, 0, 0, 1, 0, 0, 0, 1})
		}, ErrBadSample, VerdictInvalid},
		// Positions a float64 cannot keep to the millimetre: fixes that
		// far out were gated, then taken by the move recovery.
		{"pose fix at 1e20 m", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "pose", StampNs: newest - 100e6, Kind: FixPose, XM: 1e20, YM: -1e20, Cov: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}})
		}, ErrBadSample, VerdictInvalid},
		{"position fix at -1e300 m", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "position", StampNs: newest - 100e6, Kind: FixPosition, XM: -1e300, Cov: []float64{0.01, 0, 0, 0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"landmark range of 1e300 m", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "landmark", StampNs: newest - 100e6, Kind: FixLandmark, LandmarkID: "post-1", RangeM: f(1e300), Cov: []float64{0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"fix mount at 1e20 m", func(r *Robot) Result {
			return r.AddFix(Fix{SensorID: "position", StampNs: newest - 100e6, Kind: FixPosition, Mount: &estimator.Pose{X: 1e20}, Cov: []float64{0.01, 0, 0, 0.01}})
		}, ErrBadSample, VerdictInvalid},
		{"re-seed at 1e20 m", func(r *Robot) Result {
			return r.Reseed(newest-1e6, estimator.Pose{X: 1e20}, []float64{1, 0, 0, 0, 1, 0, 0, 0, 1})
		}, ErrBadSample, VerdictInvalid},
		{"reseed bad cov", func(r *Robot) Result {
			return r.Reseed(newest-1e6, estimator.Pose{}, []float64{1, 0, 0, 0, -1, 0, 0, 0, 1})
		}, ErrBadSample, VerdictInvalid},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := busyRobot(t)
			before := snap(r)
			res := c.do(r)
			if res.Verdict != c.verdict || !errors.Is(res.Err, c.want) {
				t.Fatalf("verdict %v, err %v; want %v with %v", res.Verdict, res.Err, c.verdict, c.want)
			}
			sameSnapshot(t, c.name, before, snap(r))
			// The robot goes on working.
			if res := r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0.002, 0.002, 0}}); res.Verdict != VerdictApplied {
				t.Errorf("next odometry: %v %v", res.Verdict, res.Err)
			}
			checkFinitePD(t, r)
		})
	}
}

// TestHugeTravelRefused: a wheel travel that is finite but far past any
// field (1e20 m, 1e308 m) was taken, given a sequence, and refused by
// the wheel solve as "rows do not determine forward, left and turn",
// which names neither the field nor the value. It is refused before it
// is taken, naming travel_m, and changes nothing.
func TestHugeTravelRefused(t *testing.T) {
	newest := int64(300 * 5e6)
	for _, v := range []float64{1e20, -1e20, 1e308} {
		r := busyRobot(t)
		before, seq := snap(r), r.Sequence()
		res := r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{0, v, 0}})
		if res.Verdict != VerdictInvalid || !errors.Is(res.Err, ErrBadSample) || res.Seq != 0 || r.Sequence() != seq ||
			!strings.Contains(res.Err.Error(), "travel_m") || !strings.Contains(res.Err.Error(), "1e+08 m") {
			t.Errorf("travel %g: sequence %d, %v %v; want refused before it is taken, naming travel_m and 1e+08 m", v, res.Seq, res.Verdict, res.Err)
		}
		sameSnapshot(t, "huge travel", before, snap(r))
	}
	// The largest travel a field holds is still taken (and refused as
	// implausible motion, the robot's own limit).
	r := busyRobot(t)
	if res := r.AddOdometry(Odometry{StartNs: newest, StampNs: newest + 5e6, TravelM: []float64{1e8, 1e8, 0}}); res.Seq == 0 || !errors.Is(res.Err, ErrAbsurdJump) {
		t.Errorf("travel of 1e8 m: sequence %d, %v", res.Seq, res.Err)
	}
}

// TestHeldFull: held samples are bounded.
func TestHeldFull(t *testing.T) {
	cfg := threeWheels()
	cfg.MaxHeld = 3
	r, _ := New(cfg)
	for i := 0; i < 3; i++ {
		if res := r.AddHeading(Heading{StampNs: int64(i+1) * 1e6, HeadingRad: 0}); res.Verdict != VerdictHeld {
			t.Fatalf("heading %d: %v", i, res.Verdict)
		}
	}
	before := snap(r)
	if res := r.AddHeading(Heading{StampNs: 5e6, HeadingRad: 0}); !errors.Is(res.Err, ErrHeldFull) {
		t.Errorf("fourth held sample: %v", res.Err)
	}
	sameSnapshot(t, "a sample past max_held", before, snap(r))
	res := r.AddOdometry(Odometry{StartNs: 0, StampNs: 10e6, TravelM: []float64{0, 0, 0}})
	if len(res.Resolved) != 3 {
		t.Errorf("odometry resolved %d held samples, want 3", len(res.Resolved))
	}
}

// TestCountsWrap: cumulative 16-bit counts that wrap give the same estimate
// as the travel they stand for.
func TestCountsWrap(t *testing.T) {
	cfg := threeWheels()
	cfg.IMU = IMUNone
	a, _ := New(cfg)
	b, _ := New(cfg)
	counts := []int64{65000, 100, 30}
	a.AddOdometry(Odometry{StampNs: 0, Counts: append([]int64(nil), counts...)})
	for k := int64(0); k < 200; k++ {
		step := []int64{7, 8, 1}
		tr := make([]float64, 3)
		for i := range counts {
			counts[i] = (counts[i] + step[i]) & 0xffff
			tr[i] = float64(step[i]) / 1000
		}
		if res := a.AddOdometry(Odometry{StampNs: (k + 1) * 5e6, Counts: append([]int64(nil), counts...)}); res.Verdict != VerdictApplied {
			t.Fatal(res.Err)
		}
		b.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
	}
	samePose(t, "counts against travel", a, b)
	// A counter reset is refused, and the next sample is taken from the
	// reset's counts (TestCountsRestartTakesNextSample).
	res := a.AddOdometry(Odometry{StampNs: 2000e6, Counts: []int64{30000, 0, 0}})
	if !errors.Is(res.Err, ErrAbsurdJump) {
		t.Errorf("counter reset: %v", res.Err)
	}
	if res := a.AddOdometry(Odometry{StampNs: 2005e6, Counts: []int64{30002, 2, 0}}); res.Verdict != VerdictApplied {
		t.Errorf("after the reset: %v", res.Err)
	}
}

// countsRun feeds r 200 samples of cumulative 16-bit counts every 5 ms
// (each wheel a steady 7, 8 and 1 counts a sample, as TestCountsWrap's
// cart: invented motion, a gentle curve), with edit applied to each sample's
// counts before it is sent; a sample edit returns nil for is not sent. It
// returns the verdict of each sample sent, by index.
func countsRun(t *testing.T, r *Robot, edit func(k int, c []int64) []int64) map[int]Result {
	t.Helper()
	counts := []int64{65000, 100, 30}
	out := map[int]Result{}
	for k := range 200 {
		for i, s := range []int64{7, 8, 1} {
			counts[i] = (counts[i] + s) & 0xffff
		}
		c := edit(k, append([]int64(nil), counts...))
		if c == nil {
			continue
		}
		out[k] = r.AddOdometry(Odometry{StampNs: int64(k+1) * 5e6, Counts: c})
	}
	return out
}

// jumpOnceAt100 fails unless countsRun's sample 100 was refused as an
// implausible jump (what) and every sample after it applied.
func jumpOnceAt100(t *testing.T, what string, res map[int]Result) {
	t.Helper()
	if !errors.Is(res[100].Err, ErrAbsurdJump) {
		t.Errorf("%s: %v, want ErrAbsurdJump", what, res[100].Err)
	}
	for k := 101; k < 200; k++ {
		if res[k].Verdict != VerdictApplied {
			t.Fatalf("sample %d after %s: %v %v", k, what, res[k].Verdict, res[k].Err)
		}
	}
}

// samePose fails unless a and b hold the very same pose and covariance.
func samePose(t *testing.T, what string, a, b *Robot) {
	t.Helper()
	pa, pb := a.Pose(), b.Pose()
	if pa.Pose != pb.Pose || pa.Cov != pb.Cov {
		t.Errorf("%s: %+v, want %+v", what, pa.Pose, pb.Pose)
	}
}

// TestCountsGlitchCostsNothing: one bad reading of cumulative counts (a
// bit flipped on the wire) is refused as an implausible jump, and the next
// sample is taken from the counts before it: the robot ends exactly where
// it would had the bad sample never been sent (counts are cumulative, so
// no travel is lost). A snapshot taken between the two restores a robot
// that goes on the same way.
func TestCountsGlitchCostsNothing(t *testing.T) {
	cfg := threeWheels()
	cfg.IMU = IMUNone
	glitched, _ := New(cfg)
	dropped, _ := New(cfg)
	var mid []byte
	res := countsRun(t, glitched, func(k int, c []int64) []int64 {
		if k == 100 {
			c[1] ^= 1 << 14
		}
		if k == 101 {
			mid, _ = glitched.Snapshot()
		}
		return c
	})
	countsRun(t, dropped, func(k int, c []int64) []int64 {
		if k == 100 {
			return nil
		}
		return c
	})
	jumpOnceAt100(t, "the bad reading", res)
	samePose(t, "after a bad reading", glitched, dropped)
	restored, err := RestoreSnapshot(cfg, mid)
	if err != nil {
		t.Fatal(err)
	}
	countsRun(t, restored, func(k int, c []int64) []int64 {
		if k <= 100 {
			return nil
		}
		return c
	})
	samePose(t, "restored between the bad reading and the next", restored, glitched)
}

// TestCountsRestartTakesNextSample: counts that start afresh (the encoder
// controller restarted and counts from zero again) are refused once, as an
// implausible jump, and the next sample is taken from them: the robot ends
// exactly where one fed the same motion as unbroken counts, without the
// jump's sample, does (only the jump's interval is lost).
func TestCountsRestartTakesNextSample(t *testing.T) {
	cfg := threeWheels()
	cfg.IMU = IMUNone
	restarted, _ := New(cfg)
	unbroken, _ := New(cfg)
	var at100, at99 []int64
	res := countsRun(t, restarted, func(k int, c []int64) []int64 {
		if k == 99 {
			at99 = append([]int64(nil), c...)
		}
		if k == 100 {
			at100 = append([]int64(nil), c...)
		}
		if k >= 100 {
			// The controller counts from where it restarted.
			for i := range c {
				c[i] = (c[i] - at100[i] + 40000) & 0xffff
			}
		}
		return c
	})
	countsRun(t, unbroken, func(k int, c []int64) []int64 {
		switch {
		case k == 100:
			return nil
		case k > 100:
			// The motion after the restart from where the counts were.
			for i := range c {
				c[i] = (c[i] - at100[i] + at99[i]) & 0xffff
			}
		}
		return c
	})
	jumpOnceAt100(t, "the restart", res)
	samePose(t, "after a restart of the counts", restarted, unbroken)
}

// TestStampsNotInNanoseconds: a cart's ordinary motion (2 mm per 5 ms
// interval, 0.4 m/s) stamped in microseconds or milliseconds looks a
// thousand or a million times too fast. The refusal names the interval in
// units that show it and asks whether the stamps are in nanoseconds; a
// jump over an ordinary interval does not.
func TestStampsNotInNanoseconds(t *testing.T) {
	for _, c := range []struct {
		unit     int64 // nanoseconds per stamp unit
		interval string
		hint     bool
	}{{1e3, "5µs", true}, {1e6, "5ns", true}, {1, "5ms", false}} {
		r, err := New(threeWheels())
		if err != nil {
			t.Fatal(err)
		}
		var res Result
		for k := int64(0); k < 3 && res.Err == nil; k++ {
			tr := []float64{0.002, 0.0021, 0.0001}
			if c.unit == 1 && k == 2 {
				tr = []float64{0.2, 0.2, 0} // 40 m/s: a jump
			}
			res = r.AddOdometry(Odometry{StartNs: k * 5e6 / c.unit, StampNs: (k + 1) * 5e6 / c.unit, TravelM: tr})
		}
		msg := fmt.Sprint(res.Err)
		if !errors.Is(res.Err, ErrAbsurdJump) || !strings.Contains(msg, "over "+c.interval) || strings.Contains(msg, "nanoseconds?") != c.hint {
			t.Errorf("stamps in units of %d ns: %v; want a jump over %s, asking about nanoseconds: %v", c.unit, res.Err, c.interval, c.hint)
		}
	}
}
