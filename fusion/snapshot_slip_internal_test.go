package fusion

import (
	"errors"
	"math"
	"testing"
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
