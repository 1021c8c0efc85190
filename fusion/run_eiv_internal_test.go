package fusion

import (
	"testing"

	"reckon.example/estimator"
)

// TestRunStartKeepsPoseEIV: a run started without a new pose keeps the
// pose and the turn scale with their covariance, and so the pose's
// errors-in-variables moments (DEVELOPERS.md, "Design: State"; M =
// E[c e^T] with c = P[pose, s_t], kept): they were dropped, so that the
// new run's first updates took none of the pull of the reported turns'
// noise out (the review of session 26). The IMU offset's moments start at
// zero, as its state does; a run started at a new pose has none.
func TestRunStartKeepsPoseEIV(t *testing.T) {
	cfg := threeWheels()
	cfg.Calibration = Calibration{Scale: true}
	r, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	for k := int64(0); k < 400; k++ {
		const fwd, turn = 0.002, 0.002
		if res := r.AddOdometry(Odometry{StartNs: k * 5e6, StampNs: (k + 1) * 5e6, TravelM: []float64{fwd - 0.12*turn, fwd + 0.12*turn, -0.08 * turn}}); res.Verdict != VerdictApplied {
			t.Fatal(res.Err)
		}
		if k%2 == 1 {
			if res := r.AddHeading(Heading{StampNs: (k+1)*5e6 - 1e6, HeadingRad: estimator.Wrap(0.4 * float64((k+1)*5e6-1e6) * 1e-9)}); res.Err != nil {
				t.Fatal(res.Err)
			}
		}
	}
	before := r.f.State()
	m := before.EIV()
	if m == (estimator.EIVMoments{}) {
		t.Fatal("no moments before the run start: the test says nothing")
	}
	if res := r.StartRun(RunStart{BootID: "second"}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	after := r.f.State()
	got := after.EIV()
	const d = estimator.EIVDim
	for a := 0; a < d; a++ {
		for b := 0; b < d; b++ {
			want := 0.0
			if a < 3 && b < 3 {
				want = m[a*d+b]
			}
			if got[a*d+b] != want {
				t.Errorf("moment (%d, %d) after a run start without a pose: %v, want %v", a, b, got[a*d+b], want)
			}
		}
	}
	pose := estimator.Pose{X: 1, Y: 2, Heading: 0.3}
	if res := r.StartRun(RunStart{BootID: "third", Pose: &pose, Cov: []float64{0.01, 0, 0, 0, 0.01, 0, 0, 0, 0.01}}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	third := r.f.State()
	if got := third.EIV(); got != (estimator.EIVMoments{}) {
		t.Errorf("moments after a run start at a new pose: %v, want none", got)
	}
}
