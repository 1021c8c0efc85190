package fusion

import (
	"math"
	"testing"

	"reckon.example/estimator"
)

// TestLateResetGivesSlipBack reaches the one path of restartSlip that no
// other test did: a reset that arrives late, after odometry steps stamped
// after it were inflated by a slip in progress, divides their covariances
// by the factor they carry (slipK) and compares the IMU headings after it
// again. A cart on three free wheels turns at 0.4 rad/s; from 1 s on its
// right wheel reads 30% long, which the absolute IMU does not confirm, so
// the slip comparison inflates the steps. A pose is set by hand stamped at
// 1.45 s, once fed when its stamp comes (stamp order) and once 50 ms late,
// after the steps to 1.5 s; both go on to 1.8 s. Late must equal stamp
// order: the same estimate, to the last bits a division can miss (a
// division undoes a multiplication exactly for about 89% of float64
// values: relative 1e-12 is far below any effect on the estimate).
func TestLateResetGivesSlipBack(t *testing.T) {
	const (
		stepNs  = int64(5e6)
		steps   = 360 // 1.8 s
		slipAt  = 200 // 1.0 s
		resetNs = int64(1.45e9)
		lateAt  = 300 // the late reset comes after the step ending at 1.5 s
	)
	cov := []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.001}
	pose := estimator.Pose{X: 2, Y: 1, Heading: 0.5}
	odo := func(k int) Odometry {
		const fwd, turn = 0.002, 0.002 // per 5 ms step: 0.4 m/s, 0.4 rad/s
		right := fwd + 0.12*turn
		if k >= slipAt {
			right *= 1.3
		}
		return Odometry{StartNs: int64(k) * stepNs, StampNs: int64(k+1) * stepNs, TravelM: []float64{fwd - 0.12*turn, right, -0.08 * turn}}
	}
	imu := func(k int) Heading {
		ns := int64(k)*stepNs + 2e6
		return Heading{StampNs: ns, HeadingRad: estimator.Wrap(0.4 * float64(ns) * 1e-9)}
	}
	run := func(late bool) (*Robot, bool) {
		r, err := New(threeWheels())
		if err != nil {
			t.Fatal(err)
		}
		inflated := false
		reseed := func() {
			for _, e := range r.live() {
				if e.kind == entOdo && e.t1 > resetNs && e.slipK != 0 {
					inflated = true
				}
			}
			if res := r.Reseed(resetNs, pose, cov); res.Verdict != VerdictApplied {
				t.Fatalf("reseed: %v %v", res.Verdict, res.Err)
			}
		}
		for k := 0; k < steps; k++ {
			if k%2 == 0 && k > 0 {
				if res := r.AddHeading(imu(k)); res.Err != nil {
					t.Fatalf("heading %d: %v", k, res.Err)
				}
			}
			if res := r.AddOdometry(odo(k)); res.Verdict != VerdictApplied {
				t.Fatalf("odometry %d: %v %v", k, res.Verdict, res.Err)
			}
			if !late && int64(k+1)*stepNs == resetNs || late && k+1 == lateAt {
				reseed()
			}
		}
		return r, inflated
	}
	want, _ := run(false)
	got, inflated := run(true)
	if !inflated {
		t.Fatal("no step after the reset was inflated by a slip when the late reset came: the test does not reach restartSlip's division")
	}
	ws, gs := want.f.State(), got.f.State()
	n := ws.Size()
	close := func(a, b float64) bool { return math.Abs(a-b) <= 1e-12*math.Max(math.Abs(a), math.Abs(b)) }
	for i := 0; i < n; i++ {
		if !close(gs.MeanAt(i), ws.MeanAt(i)) {
			t.Errorf("mean %d: late %v, stamp order %v", i, gs.MeanAt(i), ws.MeanAt(i))
		}
		for j := 0; j < n; j++ {
			if !close(gs.At(i, j), ws.At(i, j)) {
				t.Errorf("covariance (%d, %d): late %v, stamp order %v", i, j, gs.At(i, j), ws.At(i, j))
			}
		}
	}
	// The slip goes on after the reset: stamp order found it again.
	if want.slip.factor <= 1 {
		t.Errorf("slip factor %v after the reset in stamp order: the slip was not found again", want.slip.factor)
	}
}
