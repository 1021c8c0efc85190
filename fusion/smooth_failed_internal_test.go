package fusion

import (
	"errors"
	"testing"

	"reckon.example/estimator"
)

// TestSmootherSkipsFailedGyroStep: an IMU heading whose update failed (a
// numerical fault, which the filter takes back whole, gyro scale's step
// included) and which repeats the previous reading exactly leaves the
// smoother's step at the filter's prediction: the step holds no update,
// so its estimate after equals the one before, bit for bit (Rauch, Tung
// and Striebel 1965: a step without a measurement has Post = Pred, from
// memory). The smoother recognised an applied heading by comparing it
// with the estimate's reference heading after it, which a failed update
// that repeats the last applied reading also matches: it took the gyro
// step the filter had not (the offset's variance and the Jacobian F moved
// by the step's turn). The window is given the failure as apply leaves
// one (the entry marked failed, its checkpoint the estimate before it),
// the faults themselves being out of a test's reach.
func TestSmootherSkipsFailedGyroStep(t *testing.T) {
	n := DefaultNoise()
	n.StepTurnVarRad2PerRad = 1e-5
	n.IMUHeadingVarRad2 = 1.5e-3 * 1.5e-3
	r, err := New(Config{IMU: IMUAbsolute, Noise: n, Calibration: Calibration{GyroScaleStd: 0.03}})
	if err != nil {
		t.Fatal(err)
	}
	r.CollectSteps()
	// A spin at 1 rad/s, odometry and IMU at 50 Hz: 0.02 rad between
	// readings, past the step's 5 sqrt(2 R) = 0.011 rad, so that every
	// applied heading takes a gyro step.
	const dtNs, rate = 20e6, 1.0
	var z float64
	var repeat int64
	var steps []Step
	for k := int64(1); k <= 150; k++ {
		t1 := k * dtNs
		s := estimator.Step{TurnRad: rate * dtNs * 1e-9}
		if res := r.AddOdometry(Odometry{StartNs: t1 - dtNs, StampNs: t1, Step: &s}); res.Verdict != VerdictApplied {
			t.Fatalf("odometry at %d: %v %v", k, res.Verdict, res.Err)
		}
		if k != 40 {
			z = estimator.Wrap(0.3 + rate*float64(t1)*1e-9)
		}
		res := r.AddHeading(Heading{StampNs: t1, HeadingRad: z})
		if res.Verdict != VerdictApplied {
			t.Fatalf("heading at %d: %v %v", k, res.Verdict, res.Err)
		}
		if k == 40 {
			// The repeated reading's update fails: as apply leaves it.
			live := r.live()
			i := r.locate(t1) - 1
			e := &live[i]
			if !e.imu || e.t1 != t1 {
				t.Fatalf("entry %d is not the heading at %d", i, t1)
			}
			d, _ := r.before(i).est.GyroStep(&r.layout, e.meas.R[0], e.meas.Z[0])
			if d == 0 {
				t.Fatalf("the repeated heading takes no gyro step: the test cannot fail")
			}
			cp := r.checkpointOf(&live[i-1].after)
			r.setCheckpoint(&e.after, &cp)
			e.failed = true
			r.setErr(e.seq, errors.New("state covariance after the update not positive definite"))
			r.replayFrom(i + 1)
			repeat = t1
		}
		steps = append(steps, r.TakeSteps()...)
	}
	if repeat == 0 {
		t.Fatal("no repeated heading")
	}
	found := false
	for i := range steps {
		s := &steps[i]
		if s.StampNs != repeat {
			continue
		}
		found = true
		m := s.Pred.Size()
		for a := 0; a < m; a++ {
			if s.Post.MeanAt(a) != s.Pred.MeanAt(a) {
				t.Errorf("state %d: after the failed update %v, predicted %v", a, s.Post.MeanAt(a), s.Pred.MeanAt(a))
			}
			for b := 0; b < m; b++ {
				if s.Post.At(a, b) != s.Pred.At(a, b) {
					t.Errorf("covariance (%d, %d): after the failed update %v, predicted %v", a, b, s.Post.At(a, b), s.Pred.At(a, b))
				}
			}
		}
	}
	if !found {
		t.Fatalf("no smoother step at the repeated heading's stamp %d", repeat)
	}
}
