package fusion

import (
	"errors"
	"math"
	"strings"
	"testing"
)

// TestOdometryGapLimit: odometry stamped more than max_odometry_gap_ns past
// the newest is refused as too far ahead, naming the limit, and changes
// nothing; a gap within it is taken (an idle robot whose controller sent
// nothing for a while); a new run takes any stamp. Taken, a stamp a
// century ahead put the robot's clock out of reach: every later sample was
// refused as time running backwards.
func TestOdometryGapLimit(t *testing.T) {
	cfg := threeWheels()
	cfg.MaxOdometryGapNs = 60e9
	r, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	tr := []float64{0.002, 0.0021, 0.0001}
	for k := int64(0); k < 10; k++ {
		r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: tr})
	}
	newest := r.NewestNs()
	before := r.Estimate()
	res := r.AddOdometry(Odometry{StartNs: newest + 60e9, StampNs: newest + 60e9 + 1, TravelM: tr})
	if !errors.Is(res.Err, ErrTooFarAhead) || res.Verdict != VerdictInvalid || RefusalOf(res.Err) != RefusalTooFarAhead {
		t.Fatalf("1 ns past the limit: %v %v", res.Verdict, res.Err)
	}
	for _, want := range []string{"max_odometry_gap_ns 60000000000", "60 s after the newest odometry", "start a new run"} {
		if !strings.Contains(res.Err.Error(), want) {
			t.Errorf("refusal %q does not say %q", res.Err, want)
		}
	}
	if after := r.Estimate(); r.NewestNs() != newest || after.Pose() != before.Pose() || after.Var(0) != before.Var(0) {
		t.Fatalf("the refused sample changed the robot: newest %d, pose %v", r.NewestNs(), after.Pose())
	}
	// At the limit: taken, with an odometry gap event.
	if res := r.AddOdometry(Odometry{StartNs: newest + 60e9 - 5e6, StampNs: newest + 60e9, TravelM: tr}); res.Verdict != VerdictApplied {
		t.Fatalf("at the limit: %v %v", res.Verdict, res.Err)
	}
	// A new run takes any stamp, here far below the old clock's.
	if res := r.StartRun(RunStart{BootID: "after-the-weekend"}); res.Verdict != VerdictApplied {
		t.Fatalf("run start: %v", res.Err)
	}
	if res := r.AddOdometry(Odometry{StartNs: 0, StampNs: 5e6, TravelM: tr}); res.Verdict != VerdictApplied {
		t.Fatalf("first odometry of the new run: %v %v", res.Verdict, res.Err)
	}
	// Time running back by int64's whole range still names the jump.
	r2, _ := New(threeWheels())
	r2.AddOdometry(Odometry{StartNs: math.MaxInt64 - 10e6, StampNs: math.MaxInt64 - 5e6, TravelM: tr})
	res = r2.AddOdometry(Odometry{StartNs: math.MinInt64, StampNs: math.MinInt64 + 5e6, TravelM: tr})
	if !errors.Is(res.Err, ErrTimeBackwards) || !strings.Contains(res.Err.Error(), "a jump back of 18446744073") {
		t.Errorf("a jump back across int64's range: %v", res.Err)
	}
	// A first interval spanning int64's range: its length wrapped negative
	// and the robot took it with negative variances.
	r4, _ := New(threeWheels())
	res = r4.AddOdometry(Odometry{StartNs: math.MinInt64, StampNs: math.MaxInt64, TravelM: tr})
	if !errors.Is(res.Err, ErrBadSample) || !strings.Contains(res.Err.Error(), "longer than max_odometry_gap_ns") {
		t.Errorf("a first interval of int64's range: %v %v", res.Verdict, res.Err)
	}
	if st := r4.Estimate(); st.Var(0) <= 0 || st.Var(2) <= 0 {
		t.Errorf("variances %g, %g after the refused interval", st.Var(0), st.Var(2))
	}
	// A pose asked for int64's range ahead of a clock that began far below
	// zero: the difference wrapped negative and the robot extrapolated
	// backwards.
	r3, _ := New(threeWheels())
	for k := int64(0); k < 3; k++ {
		r3.AddOdometry(Odometry{StartNs: math.MinInt64 + k*5e6, StampNs: math.MinInt64 + (k+1)*5e6, TravelM: tr})
	}
	if _, err := r3.PoseAt(math.MaxInt64); !errors.Is(err, ErrTooFarAhead) {
		t.Errorf("a pose int64's range ahead: %v", err)
	}
}
