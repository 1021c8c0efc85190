package fusion

import (
	"errors"
	"math"
	"testing"

	"reckon.example/estimator"
)

// Tests of habits that real controllers and sensors have and simulators
// rarely do: repeated readings, bursts of samples, counters that wrap.

// habitCart drives cfg's wheels along an invented greenhouse-aisle curve
// (1 m/s, 0.4 rad/s) and returns its cumulative counts, 16 bits wide, at
// sample k of a 5 ms loop.
func habitCounts(cfg Config, k int) []int64 {
	a, dth := 0.005*float64(k), 0.002*float64(k)
	out := make([]int64, len(cfg.Wheels))
	for i, w := range cfg.Wheels {
		c := estimator.WheelCoef(w.XM, w.YM, w.DirectionRad)
		out[i] = int64(math.Round((c[0]*a+c[2]*dth)*w.CountsPerM)) & 0xffff
	}
	return out
}

// habitRobot returns a robot of threeWheels with its IMU that has driven
// n samples of habitCounts.
func habitRobot(t *testing.T, n int) *Robot {
	t.Helper()
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	for k := range n {
		h := 0.3 + 0.002*float64(k)
		if res := r.AddOdometry(Odometry{StampNs: int64(k) * 5e6, Counts: habitCounts(r.cfg, k), IMUHeadingRad: &h}); res.Err != nil {
			t.Fatal(res.Err)
		}
	}
	return r
}

// TestRepeatedReadingTakenOnce: a camera that sends its last detection
// again, or a bus that delivers a message twice, repeats a reading with
// its stamp and values (common practice: UDP may duplicate datagrams, and
// vision pipelines re-publish their last result when no new frame came).
// The repeat is refused, naming the input it repeats, and the estimate is
// that of the reading taken once: before, a fix sent five times cut the
// position's standard deviation by sqrt(5) with no new information. Two
// readings of one sensor at one stamp with different values (two markers
// in one camera frame) are both taken. A fix held (stamped past the
// newest odometry) and an IMU heading are refused the same way, and so
// are repeats reaching a robot restored from a snapshot.
func TestRepeatedReadingTakenOnce(t *testing.T) {
	fix := Fix{StampNs: 190 * 5e6, SensorID: "position", Kind: FixPosition, XM: 0.95, YM: 0.1, Cov: []float64{1e-4, 0, 0, 1e-4}}
	other := fix
	other.XM += 0.004
	ahead := fix
	ahead.StampNs = 205 * 5e6
	heading := Heading{StampNs: 195 * 5e6, HeadingRad: 0.7}
	feed := func(r *Robot, repeat bool) []Result {
		var out []Result
		for _, in := range []func() Result{
			func() Result { return r.AddFix(fix) }, func() Result { return r.AddFix(other) },
			func() Result { return r.AddFix(ahead) }, func() Result { return r.AddHeading(heading) },
		} {
			in()
			if repeat {
				out = append(out, in())
			}
		}
		return out
	}
	once, twice := habitRobot(t, 200), habitRobot(t, 200)
	feed(once, false)
	for i, res := range feed(twice, true) {
		if !errors.Is(res.Err, ErrRepeated) || res.Verdict != VerdictInvalid || res.Seq == 0 {
			t.Errorf("repeat %d: %v %v (seq %d), want invalid ErrRepeated with a sequence number", i, res.Verdict, res.Err, res.Seq)
		}
	}
	// The held fix is released: both robots now hold the same estimate.
	for k := 200; k < 210; k++ {
		for _, r := range []*Robot{once, twice} {
			h := 0.3 + 0.002*float64(k)
			r.AddOdometry(Odometry{StampNs: int64(k) * 5e6, Counts: habitCounts(r.cfg, k), IMUHeadingRad: &h})
		}
	}
	samePose(t, "readings sent twice", twice, once)
	b, err := once.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	restored, err := RestoreSnapshot(once.cfg, b)
	if err != nil {
		t.Fatal(err)
	}
	if res := restored.AddFix(fix); !errors.Is(res.Err, ErrRepeated) {
		t.Errorf("repeat after a restore: %v %v", res.Verdict, res.Err)
	}
	samePose(t, "a repeat after a restore", restored, once)
}
