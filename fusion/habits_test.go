package fusion

import (
	"errors"
	"fmt"
	"math"
	"slices"
	"strings"
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

// TestOdometryBursts: a controller that stamps its samples when they
// arrive, over a USB or CAN link that delivers three at once (common
// practice: such links buffer and deliver in bursts), sends three samples
// with one stamp or stamps microseconds apart; one that sends a sample
// twice sends its stamp and counts again. The second and third of a burst
// are refused, their reasons naming stamps taken on arrival; the repeat
// is refused as a repeat, not as time running backwards. Counts being
// cumulative, none of it costs travel: the robot ends exactly where one
// fed only each burst's first sample does. Before, the reasons said only
// that time ran backwards, or asked whether the stamps were in
// nanoseconds, and a repeat read as time running backwards.
func TestOdometryBursts(t *testing.T) {
	cfg := threeWheels()
	cfg.IMU = IMUNone
	for _, c := range []struct {
		name    string
		spacing int64 // ns between the stamps of one burst
		err     error
		reason  string
	}{
		{"one stamp", 0, ErrTimeBackwards, "stamped on arrival"},
		{"10 µs apart", 10e3, ErrAbsurdJump, "stamped on arrival"},
	} {
		burst, _ := New(cfg)
		firsts, _ := New(cfg)
		for k := range 300 {
			stamp := int64(k/3*3)*5e6 + int64(k%3)*c.spacing
			res := burst.AddOdometry(Odometry{StampNs: stamp, Counts: habitCounts(cfg, k)})
			if k%3 == 0 {
				firsts.AddOdometry(Odometry{StampNs: stamp, Counts: habitCounts(cfg, k)})
				if res.Err != nil {
					t.Fatalf("%s: first of a burst: %v", c.name, res.Err)
				}
			} else if !errors.Is(res.Err, c.err) || !strings.Contains(res.Err.Error(), c.reason) {
				t.Fatalf("%s: sample %d: %v, want %v naming %q", c.name, k, res.Err, c.err, c.reason)
			}
		}
		samePose(t, c.name, burst, firsts)
	}
	r, _ := New(cfg)
	for k := range 10 {
		r.AddOdometry(Odometry{StampNs: int64(k) * 5e6, Counts: habitCounts(cfg, k)})
	}
	before := snap(r)
	res := r.AddOdometry(Odometry{StampNs: 9 * 5e6, Counts: habitCounts(cfg, 9)})
	if !errors.Is(res.Err, ErrRepeated) || res.Seq != 0 || !strings.Contains(res.Err.Error(), "sent twice") {
		t.Errorf("odometry sent twice: %v (seq %d), want ErrRepeated naming a sample sent twice, not taken", res.Err, res.Seq)
	}
	sameSnapshot(t, "odometry sent twice", before, snap(r))
}

// TestCountsWrapBothWays: 16-bit counters (counter_bits 16) crossing
// their wrap forward and back again at 4 m/s, 20 mm a 5 ms sample, are
// taken as the same travel given in metres (countDelta's signed
// difference; common practice for quadrature counters). With counter_bits
// unset the first wrap is refused, and the reason names the wheel and the
// counter width that explains it; before, it said only "1.31e+04 m/s".
func TestCountsWrapBothWays(t *testing.T) {
	cfg := threeWheels()
	cfg.IMU = IMUNone
	counted, _ := New(cfg)
	travelled, _ := New(cfg)
	unset := cfg
	unset.Wheels = append([]Wheel(nil), cfg.Wheels...)
	for i := range unset.Wheels {
		unset.Wheels[i].CounterBits = 0
	}
	noBits, _ := New(unset)
	counts := []int64{65500, 65450, 3}
	var wrapErr error
	for k := range 80 {
		step := []int64{20, 20, 0}
		if k >= 40 {
			step = []int64{-20, -20, 0} // back across the wrap
		}
		tr := make([]float64, 3)
		if k > 0 {
			for i := range counts {
				counts[i] = (counts[i] + step[i]) & 0xffff
				tr[i] = float64(step[i]) / 1000
			}
		}
		o := Odometry{StampNs: int64(k) * 5e6, Counts: append([]int64(nil), counts...)}
		if res := counted.AddOdometry(o); res.Err != nil {
			t.Fatalf("sample %d: %v", k, res.Err)
		}
		if res := noBits.AddOdometry(o); res.Err != nil && wrapErr == nil {
			wrapErr = res.Err
		}
		if k > 0 {
			travelled.AddOdometry(Odometry{StartNs: int64(k-1) * 5e6, StampNs: int64(k) * 5e6, TravelM: tr})
		}
	}
	samePose(t, "counts across the wrap and back", counted, travelled)
	if !errors.Is(wrapErr, ErrAbsurdJump) || !strings.Contains(fmt.Sprint(wrapErr), "wheels[0]'s count moved by -65516, as a 16-bit counter does when it wraps: is its counter_bits 16?") {
		t.Errorf("counter_bits unset, a wrap: %v", wrapErr)
	}
}

// turnThenStraight returns the cumulative counts and true heading of an
// invented greenhouse cart at 5 ms sample k: 1 m/s, turning at 2 rad/s
// for samples [turnFrom, turnTo), straight otherwise.
func turnThenStraight(cfg Config, k, turnFrom, turnTo int) ([]int64, float64) {
	turned := 0.01 * float64(min(max(k-turnFrom, 0), turnTo-turnFrom))
	out := make([]int64, len(cfg.Wheels))
	for i, w := range cfg.Wheels {
		c := estimator.WheelCoef(w.XM, w.YM, w.DirectionRad)
		out[i] = int64(math.Round((c[0]*0.005*float64(k)+c[2]*turned)*w.CountsPerM)) & 0xffff
	}
	return out, turned
}

// TestFrozenIMUDistrusted: an IMU whose driver goes on sending its last
// heading after the device hung (common practice: drivers publish a
// cached value rather than nothing) freezes as the cart starts a 0.6 rad
// turn at 2 rad/s. The estimate follows the IMU (the slip comparison takes
// the disagreement for wheels that slip), so the robot must not be
// trusted: imu_unchanged is raised once the wheels turned 0.1 rad
// (10 samples), stands through the straight after the turn, and clears
// once the IMU reads again. Before, the robot stayed trusted with its
// heading 0.3 rad off and a heading standard deviation of 0.035 rad. A
// snapshot taken while it stands restores a robot that clears it at the
// same input, and an honest IMU quantised to 0.1 degree never raises it,
// driving straight or turning.
func TestFrozenIMUDistrusted(t *testing.T) {
	cfg := threeWheels()
	const turnFrom, turnTo, recover = 200, 260, 400
	feed := func(r *Robot, from, to int, imu func(k int, truth float64) float64) []TrustReason {
		var out []TrustReason
		for k := from; k < to; k++ {
			c, th := turnThenStraight(cfg, k, turnFrom, turnTo)
			h := imu(k, th)
			if res := r.AddOdometry(Odometry{StampNs: int64(k) * 5e6, Counts: c, IMUHeadingRad: &h}); res.Err != nil {
				t.Fatalf("sample %d: %v", k, res.Err)
			}
			out = append(out, r.Pose().Distrust)
		}
		return out
	}
	frozen := func(k int, th float64) float64 {
		if k >= turnFrom && k < recover {
			_, th = turnThenStraight(cfg, turnFrom, turnFrom, turnTo)
		}
		return estimator.Wrap(th + 0.3)
	}
	r, _ := New(cfg)
	reasons := feed(r, 0, 300, frozen)
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	reasons = append(reasons, feed(r, 300, 500, frozen)...)
	for k, d := range reasons {
		want := k >= turnFrom+10 && k < recover
		if got := d&TrustIMUUnchanged != 0; got != want {
			t.Fatalf("sample %d: distrust %v, want imu_unchanged %v", k, d, want)
		}
	}
	restored, err := RestoreSnapshot(cfg, b)
	if err != nil {
		t.Fatal(err)
	}
	if again := feed(restored, 300, 500, frozen); !slices.Equal(again, reasons[300:]) {
		t.Errorf("restored mid-freeze: reasons %v, want %v", again, reasons[300:])
	}
	// 0.1 degree steps (from memory: a common resolution of IMU heading
	// outputs).
	quantised := func(k int, th float64) float64 {
		const q = 0.1 * math.Pi / 180
		return math.Round(estimator.Wrap(th+0.3)/q) * q
	}
	honest, _ := New(cfg)
	for k, d := range feed(honest, 0, 500, quantised) {
		if d&TrustIMUUnchanged != 0 {
			t.Fatalf("quantised honest IMU, sample %d: %v", k, d)
		}
	}
}
