package fusion

import (
	"errors"
	"math"
	"strings"
	"testing"

	"reckon.example/estimator"
)

// TestSnapshotSlipFactorChecked: a snapshot whose window step carries a
// slip factor that is not a positive finite number (a damaged or forged
// snapshot: the CRC of a journal record guards only against damage in
// it) is refused with ErrSnapshot, not restored into a covariance that a
// reset would scale by it (restartSlip); one with a valid factor restores
// it.
func TestSnapshotSlipFactorChecked(t *testing.T) {
	for _, c := range []struct {
		name string
		k    float64
		ok   bool
	}{{"valid", 2.5, true}, {"NaN", math.NaN(), false}, {"negative", -3, false}, {"infinite", math.Inf(1), false}} {
		r := busyRobot(t)
		odo := -1
		for i, e := range r.live() {
			if e.kind == entOdo {
				odo = i
				break
			}
		}
		if odo < 0 {
			t.Fatal("no odometry step in the window")
		}
		r.live()[odo].slipK = c.k
		b, err := r.Snapshot()
		if err != nil {
			t.Fatal(err)
		}
		got, err := RestoreSnapshot(r.Config(), b)
		switch {
		case c.ok && err != nil:
			t.Errorf("%s: %v", c.name, err)
		case c.ok && got.live()[odo].slipK != c.k:
			t.Errorf("%s: restored factor %v, want %v", c.name, got.live()[odo].slipK, c.k)
		case !c.ok && !errors.Is(err, ErrSnapshot):
			t.Errorf("%s: %v, want ErrSnapshot", c.name, err)
		}
	}
}

// TestSnapshotValuesChecked: a snapshot whose numbers a replay would
// compute with are not an estimate's or an input's (a NaN, an infinity, a
// negative variance, a correlation past 1: a damaged or forged snapshot,
// as above) is refused with ErrSnapshot naming what and where, so that
// the service replays the journal's inputs from the start instead of
// serving a robot restored into nonsense. The same robot's snapshot
// unchanged restores.
func TestSnapshotValuesChecked(t *testing.T) {
	nan, inf := math.NaN(), math.Inf(1)
	find := func(r *Robot, k entryKind) *entry {
		for i := range r.ents {
			if e := &r.ents[i]; e.kind == k && i >= r.head {
				return e
			}
		}
		t.Fatalf("no entry of kind %d in the window", k)
		return nil
	}
	badState := func(r *Robot, at int, v float64) estimator.State {
		st := r.f.State()
		n := st.Size()
		x := make([]float64, n)
		p := make([]float64, n*n)
		st.MeanInto(x)
		st.CovarianceInto(p)
		if at < 0 {
			x[0] = v
		} else {
			p[at] = v
		}
		return estimator.NewState(n, st.Angles(), x, p)
	}
	for _, c := range []struct {
		name, want string
		harm       func(r *Robot)
	}{
		{"unchanged", "", func(*Robot) {}},
		{"step covariance NaN", "step has covariance NaN", func(r *Robot) { find(r, entOdo).cov[4] = nan }},
		{"step not finite", "step {", func(r *Robot) { find(r, entOdo).step.TurnRad = inf }},
		{"scrub negative", "scrub variance -1", func(r *Robot) { find(r, entOdo).scrub = -1 }},
		{"fix infinite", "is not finite", func(r *Robot) { find(r, entMeas).meas.Z[0] = inf }},
		{"fix correlation past 1", "fix has covariance 0.02 at (1, 0)", func(r *Robot) {
			m := &find(r, entMeas).meas
			m.R[1], m.R[3] = 0.02, 0.02
		}},
		{"checkpoint variance negative", "the estimate after it has variance -1 in state 0", func(r *Robot) {
			d := r.slotData(find(r, entOdo).after.Slot)
			d[r.n] = -1
		}},
		{"estimate NaN", "the estimate has mean NaN", func(r *Robot) {
			st := badState(r, -1, nan)
			r.f.SetState(&st)
		}},
		{"starting estimate infinite", "the window's starting estimate has covariance +Inf at (0, 1)", func(r *Robot) {
			r.base.est = badState(r, 1, inf)
		}},
	} {
		r := busyRobot(t)
		c.harm(r)
		restoreSays(t, r, c.name, c.want)
	}
}

// restoreSays fails unless r's snapshot restores (want empty) or is
// refused with ErrSnapshot saying want.
func restoreSays(t *testing.T, r *Robot, name, want string) {
	t.Helper()
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	_, err = RestoreSnapshot(r.Config(), b)
	switch {
	case want == "" && err != nil:
		t.Errorf("%s: %v", name, err)
	case want != "" && (!errors.Is(err, ErrSnapshot) || !strings.Contains(err.Error(), want)):
		t.Errorf("%s: %v, want ErrSnapshot saying %q", name, err, want)
	}
}

// TestSnapshotMomentsChecked: a snapshot whose estimate, or a checkpoint's,
// holds a turn scale's errors-in-variables moment that is not finite is
// refused with ErrSnapshot naming it: every update that moves the turn
// scale subtracts the moments' pull from its mean, which such a moment
// would make not finite, and the pose after it, where the covariance's
// Cholesky check does not look. TestSnapshotValuesChecked checks the rest
// of an estimate's numbers.
func TestSnapshotMomentsChecked(t *testing.T) {
	busy := func(t *testing.T) *Robot {
		cfg := threeWheels()
		cfg.Calibration.Scale = true
		r, err := New(cfg)
		if err != nil {
			t.Fatal(err)
		}
		for k := int64(0); k < 300; k++ {
			// A slow turn, so that the moments are not zero.
			if res := r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: []float64{0.002, 0.0024, 0.0001}}); res.Verdict != VerdictApplied {
				t.Fatal(res.Err)
			}
			if k%2 == 0 {
				r.AddHeading(Heading{StampNs: k*5e6 + 2e6, HeadingRad: 0.3 + float64(k)*0.0083})
			}
		}
		if st := r.f.State(); st.EIV() == (estimator.EIVMoments{}) {
			t.Fatal("the moments are zero")
		}
		return r
	}
	for _, c := range []struct {
		name, want string
		harm       func(r *Robot)
	}{
		{"unchanged", "", func(*Robot) {}},
		{"estimate", "the estimate has errors-in-variables moment NaN at (2, 3)", func(r *Robot) {
			st := r.f.State()
			m := st.EIV()
			m[2*estimator.EIVDim+3] = math.NaN()
			st.SetEIV(m)
			r.f.SetState(&st)
		}},
		{"checkpoint", "the estimate after it has errors-in-variables moment +Inf at (0, 0)", func(r *Robot) {
			for i := r.head; i < len(r.ents); i++ {
				if e := &r.ents[i]; e.kind == entOdo && e.after.Slot != 0 {
					r.slotData(e.after.Slot)[r.n+r.n*r.n] = math.Inf(1)
					return
				}
			}
			t.Fatal("no checkpoint of a step in the window")
		}},
	} {
		r := busy(t)
		c.harm(r)
		restoreSays(t, r, c.name, c.want)
	}
}
