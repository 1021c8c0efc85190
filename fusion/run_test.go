package fusion

import (
	"errors"
	"math"
	"strings"
	"testing"

	"reckon.example/estimator"
)

// feedRun gives the robot k odometry samples of cumulative counts from
// stamp 0 on its own clock (a controller just booted: counts from 0), with
// an IMU heading every other one, and fails on a refusal.
func feedRun(t *testing.T, r *Robot, k int) {
	t.Helper()
	for i := int64(0); i < int64(k); i++ {
		c := (i + 1) * 2
		res := r.AddOdometry(Odometry{StampNs: (i + 1) * 5e6, Counts: []int64{c, c, 0}})
		if res.Seq == 0 || res.Verdict != VerdictApplied {
			t.Fatalf("odometry %d of run %d: %v %v", i, r.Run(), res.Verdict, res.Err)
		}
		if i%2 == 0 {
			if res := r.AddHeading(Heading{StampNs: (i+1)*5e6 + 1e6, HeadingRad: 1.1}); res.Seq == 0 {
				t.Fatalf("heading %d: %v", i, res.Err)
			}
		}
	}
}

// TestStartRun: a controller reboot's clock jump is refused with the
// remedy named; a run start then carries the pose and its covariance into
// run 2, resolves the held fix too old, initialises the IMU offset again,
// and the new clock's inputs from stamp 0 are taken.
func TestStartRun(t *testing.T) {
	r := busyRobot(t)
	before := r.f.State()
	seq := r.Sequence()
	if r.Run() != 1 || r.BootID() != "" {
		t.Fatalf("a new robot is in run %d, boot %q", r.Run(), r.BootID())
	}
	// The controller restarted: its clock and counts start again.
	res := r.AddOdometry(Odometry{StampNs: 5e6, Counts: []int64{0, 0, 0}})
	if res.Seq != 0 || !errors.Is(res.Err, ErrTimeBackwards) || !strings.Contains(res.Err.Error(), "start a new run") {
		t.Fatalf("odometry from the rebooted clock: seq %d, %v; want refused naming the remedy", res.Seq, res.Err)
	}
	// A small step back is bad input of the ordinary kind: no hint.
	res = r.AddOdometry(Odometry{StampNs: r.NewestNs() - 1e6, Counts: []int64{0, 0, 0}})
	if !errors.Is(res.Err, ErrTimeBackwards) || strings.Contains(res.Err.Error(), "new run") {
		t.Fatalf("odometry 1 ms back: %v", res.Err)
	}

	res = r.StartRun(RunStart{BootID: "boot-2"})
	if res.Seq != seq+1 || res.Verdict != VerdictApplied {
		t.Fatalf("run start: seq %d verdict %v %v", res.Seq, res.Verdict, res.Err)
	}
	if r.Run() != 2 || r.BootID() != "boot-2" {
		t.Fatalf("run %d boot %q after the run start", r.Run(), r.BootID())
	}
	if len(res.Resolved) != 1 || res.Resolved[0].Verdict != VerdictTooOld || !errors.Is(res.Resolved[0].Err, ErrTooOld) {
		t.Fatalf("the held fix: %+v, want resolved too old", res.Resolved)
	}
	if !hasEvent(res.Events, EventRunStarted) {
		t.Errorf("no run_started event in %+v", res.Events)
	}
	after := r.f.State()
	for i := 0; i < 3; i++ {
		if after.MeanAt(i) != before.MeanAt(i) {
			t.Errorf("pose[%d] %v, want %v carried over", i, after.MeanAt(i), before.MeanAt(i))
		}
		for j := 0; j < 3; j++ {
			if after.At(i, j) != before.At(i, j) {
				t.Errorf("cov[%d][%d] %v, want %v carried over", i, j, after.At(i, j), before.At(i, j))
			}
		}
	}
	if r.ready {
		t.Error("the IMU offset is still initialised after a run start")
	}
	if st := r.Stats(); st.Held != 0 || st.Distrust&TrustNoOdometry == 0 {
		t.Errorf("after the run start: %d held, distrust %v; want none held, no_odometry", st.Held, st.Distrust)
	}
	checkFinitePD(t, r)
	feedRun(t, r, 300)
	if !r.ready {
		t.Error("the IMU offset was not initialised again in run 2")
	}
	if r.Sequence() <= seq+1 {
		t.Errorf("sequence %d did not go on from %d", r.Sequence(), seq+1)
	}
}

func hasEvent(evs []Event, k EventKind) bool {
	for _, e := range evs {
		if e.Kind == k {
			return true
		}
	}
	return false
}

// TestStartRunCarriesScales: the odometry scales (properties of the
// wheels) carry over with their covariance; the rate bias starts again
// from its prior; a re-seed replaces the pose and its covariance and
// leaves the scales uncorrelated with it.
func TestStartRunCarriesScales(t *testing.T) {
	cfg := threeWheels()
	cfg.Calibration = Calibration{Scale: true, RateBias: true}
	r, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	feedRun(t, r, 200)
	l := r.Layout()
	fs, ts, rb := l.ForwardScale(), l.TurnScale(), l.RateBias()
	before := r.f.State()
	prior, _ := New(cfg)
	if res := r.StartRun(RunStart{BootID: "b"}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	after := r.f.State()
	for _, i := range []int{0, 1, 2, fs, ts} {
		for _, j := range []int{0, 1, 2, fs, ts} {
			if after.At(i, j) != before.At(i, j) {
				t.Errorf("cov[%d][%d] %v, want %v carried", i, j, after.At(i, j), before.At(i, j))
			}
		}
	}
	if p := prior.f.State(); after.MeanAt(rb) != p.MeanAt(rb) || after.Var(rb) != p.Var(rb) || after.At(rb, 2) != 0 {
		t.Errorf("rate bias %v var %v (cross %v), want the prior %v var %v", after.MeanAt(rb), after.Var(rb), after.At(rb, 2), p.MeanAt(rb), p.Var(rb))
	}
	pose := estimator.Pose{X: 4, Y: -1, Heading: 7} // wrapped to 7 - 2 pi
	cov := []float64{0.01, 0, 0, 0, 0.02, 0, 0, 0, 0.003}
	if res := r.StartRun(RunStart{BootID: "c", Run: 3, Pose: &pose, Cov: cov}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	st := r.f.State()
	if st.MeanAt(0) != 4 || st.MeanAt(1) != -1 || st.MeanAt(2) != estimator.Wrap(7) || st.Var(1) != 0.02 || st.At(0, fs) != 0 || st.Var(fs) != before.Var(fs) {
		t.Errorf("re-seeded run: mean %v %v %v, var y %v, cov(x, scale) %v", st.MeanAt(0), st.MeanAt(1), st.MeanAt(2), st.Var(1), st.At(0, fs))
	}
	checkFinitePD(t, r)
}

// TestStartRunCarriesGyroScale: the gyro scale (a property of the gyro,
// which a reboot does not change, as the wheels' scales are the wheels')
// carries over with its covariance with the pose and the odometry scales,
// with and without a re-seed's pose (which leaves it uncorrelated with the
// pose); the IMU offset, which the IMU zeroes at power-on, starts afresh,
// uncorrelated with it. Before, it started again from its prior, 0 with
// the configured standard deviation, at every run.
func TestStartRunCarriesGyroScale(t *testing.T) {
	cfg := threeWheels()
	cfg.Sensors = nil
	cfg.Calibration = Calibration{Scale: true, GyroScaleStd: 0.03}
	r, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	feedRun(t, r, 200)
	l := r.Layout()
	g, o, ts := l.GyroScale(), l.Offset(), l.TurnScale()
	// A learnt gyro scale, correlated with the heading, the offset and
	// the turn scale (a positive definite covariance: the prior's, with
	// small cross terms).
	st := r.f.State()
	n := st.Size()
	x, p := make([]float64, n), make([]float64, n*n)
	st.MeanInto(x)
	st.CovarianceInto(p)
	x[g] = 0.012
	p[g*n+g] = 4e-6
	for _, i := range []int{2, o, ts} {
		c := 0.3 * math.Sqrt(p[g*n+g]*p[i*n+i])
		p[g*n+i], p[i*n+g] = c, c
	}
	learnt := estimator.NewState(n, st.Angles(), x, p)
	r.f.SetState(&learnt)
	if res := r.StartRun(RunStart{BootID: "b"}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	after := r.f.State()
	if after.MeanAt(g) != 0.012 || after.Var(g) != 4e-6 || after.At(g, 2) != learnt.At(g, 2) || after.At(g, ts) != learnt.At(g, ts) || after.At(g, o) != 0 {
		t.Errorf("gyro scale %v var %v, cov with heading %v, turn scale %v, offset %v; want 0.012, 4e-6, %v, %v and 0 (the offset afresh)",
			after.MeanAt(g), after.Var(g), after.At(g, 2), after.At(g, ts), after.At(g, o), learnt.At(g, 2), learnt.At(g, ts))
	}
	checkFinitePD(t, r)
	pose := estimator.Pose{X: 4, Y: -1}
	if res := r.StartRun(RunStart{BootID: "c", Run: 3, Pose: &pose, Cov: []float64{0.01, 0, 0, 0, 0.02, 0, 0, 0, 0.003}}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	if st := r.f.State(); st.MeanAt(g) != 0.012 || st.Var(g) != 4e-6 || st.At(g, 2) != 0 || st.At(g, ts) != learnt.At(g, ts) {
		t.Errorf("re-seeded run: gyro scale %v var %v, cov with heading %v, turn scale %v; want 0.012, 4e-6, 0, %v", st.MeanAt(g), st.Var(g), st.At(g, 2), st.At(g, ts), learnt.At(g, ts))
	}
	checkFinitePD(t, r)
}

// TestStartRunBadInput: a run start that would not start the next run, or
// that is malformed, is refused naming the field, and changes nothing.
func TestStartRunBadInput(t *testing.T) {
	r := busyRobot(t)
	if res := r.StartRun(RunStart{BootID: "two"}); res.Verdict != VerdictApplied {
		t.Fatal(res.Err)
	}
	feedRun(t, r, 10)
	bad := estimator.Pose{X: 1}
	cases := []struct {
		name  string
		s     RunStart
		kind  error
		field string
	}{
		{"empty boot id", RunStart{}, ErrBadSample, "boot_id"},
		{"the current boot again", RunStart{BootID: "two"}, ErrRunOutOfOrder, "boot_id"},
		{"run backwards", RunStart{BootID: "three", Run: 1}, ErrRunOutOfOrder, "run"},
		{"the current run again", RunStart{BootID: "three", Run: 2}, ErrRunOutOfOrder, "run"},
		{"a run skipped", RunStart{BootID: "three", Run: 4}, ErrRunOutOfOrder, "run"},
		{"covariance without pose", RunStart{BootID: "three", Cov: []float64{1, 0, 0, 0, 1, 0, 0, 0, 1}}, ErrBadSample, "pose"},
		// The covariance at fault is named as such (session 25; it was
		// named "pose").
		{"pose without covariance", RunStart{BootID: "three", Pose: &bad}, ErrBadSample, "covariance"},
		{"covariance not positive definite", RunStart{BootID: "three", Pose: &bad, Cov: []float64{1, 2, 0, 2, 1, 0, 0, 0, 1}}, ErrBadSample, "covariance"},
	}
	for _, c := range cases {
		was, seq, stats := snap(r), r.Sequence(), r.Stats()
		res := r.StartRun(c.s)
		if res.Seq != 0 || !errors.Is(res.Err, c.kind) || FieldOf(res.Err) != c.field {
			t.Errorf("%s: seq %d, %v (field %q); want refused, %v, field %q", c.name, res.Seq, res.Err, FieldOf(res.Err), c.kind, c.field)
		}
		if c.kind == ErrRunOutOfOrder && RefusalOf(res.Err) != RefusalRunOutOfOrder {
			t.Errorf("%s: refusal %v", c.name, RefusalOf(res.Err))
		}
		sameSnapshot(t, c.name, was, snap(r))
		if r.Sequence() != seq || r.Run() != 2 || r.BootID() != "two" || r.Stats().Odometry != stats.Odometry || r.Stats().Measurements != stats.Measurements {
			t.Errorf("%s: the robot changed (sequence %d, run %d)", c.name, r.Sequence(), r.Run())
		}
	}
}

// TestStartRunSnapshot: a robot in its second run snapshots and restores
// with its run and boot, and goes on exactly.
func TestStartRunSnapshot(t *testing.T) {
	r := busyRobot(t)
	r.StartRun(RunStart{BootID: "two"})
	feedRun(t, r, 50)
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	q, err := RestoreSnapshot(threeWheels(), b)
	if err != nil {
		t.Fatal(err)
	}
	if q.Run() != 2 || q.BootID() != "two" || q.Pose() != r.Pose() {
		t.Fatalf("restored: run %d boot %q", q.Run(), q.BootID())
	}
	a, c := r.StartRun(RunStart{BootID: "three"}), q.StartRun(RunStart{BootID: "three"})
	if a.Seq != c.Seq || r.Pose() != q.Pose() || q.Run() != 3 {
		t.Errorf("the restored robot's next run differs: %+v vs %+v", a, c)
	}
}

// TestStartRunSteps: the steps of the last run become final at the run
// start, and the new run's first step starts a new segment of the
// smoother.
func TestStartRunSteps(t *testing.T) {
	r, err := New(threeWheels())
	if err != nil {
		t.Fatal(err)
	}
	r.CollectSteps()
	feedRun(t, r, 100)
	r.StartRun(RunStart{BootID: "two"})
	first := r.TakeSteps()
	if len(first) == 0 || first[len(first)-1].StampNs != 100*5e6 {
		t.Fatalf("run 1's steps at the run start: %d, the last at %v", len(first), first[len(first)-1].StampNs)
	}
	feedRun(t, r, 100)
	second := append(r.TakeSteps(), r.FinishSteps()...)
	if len(second) == 0 || !second[0].Start || second[0].StampNs > 5e6 {
		t.Fatalf("run 2's first step: %+v", second[0].StampNs)
	}
	for i, s := range second[1:] {
		if s.Start || s.StampNs <= second[i].StampNs {
			t.Fatalf("run 2's step %d: start %v at %d after %d", i+1, s.Start, s.StampNs, second[i].StampNs)
		}
	}
	if err := Smooth(MemSteps(append(first, second...)), make(MemStates, len(first)+len(second))); err != nil {
		t.Fatalf("smoothing across the run start: %v", err)
	}
}

// TestOneSampleRunHasItsStep: a run whose only odometry is its first
// sample has an estimate (the robot serves its start pose and covariance
// from that sample on), so it has one step there for the smoother and
// the review; before, its base never left the window as an entry and the
// run had no step at all, so that a review of it showed a 95% radius of
// 0 m, as certain as a run can be. The same for a run 1 of one sample
// ended by a run start, and for a run 2 of one sample; a run without
// odometry, and a second FinishSteps, give none.
func TestOneSampleRunHasItsStep(t *testing.T) {
	one := func(r *Robot, stamp int64) {
		t.Helper()
		if res := r.AddOdometry(Odometry{StampNs: stamp, Counts: []int64{0, 0, 0}}); res.Verdict != VerdictApplied {
			t.Fatalf("odometry: %v %v", res.Verdict, res.Err)
		}
	}
	// only checks that steps is a single Start step at stamp whose
	// prediction and estimate are what the robot served there.
	only := func(what string, steps []Step, stamp int64, served FusedPose) {
		t.Helper()
		if len(steps) != 1 {
			t.Fatalf("%s: %d steps, want 1", what, len(steps))
		}
		s := steps[0]
		var cov [9]float64
		s.Post.PoseCovarianceInto(&cov)
		if !s.Start || s.StampNs != stamp || s.Post.Pose() != served.Pose || cov != served.Cov || s.Pred.Pose() != s.Post.Pose() {
			t.Errorf("%s: step start %v at %d, pose %v cov %v; want a start at %d with the served %v, %v", what, s.Start, s.StampNs, s.Post.Pose(), cov, stamp, served.Pose, served.Cov)
		}
	}
	newRobot := func() *Robot {
		r, err := New(threeWheels())
		if err != nil {
			t.Fatal(err)
		}
		r.CollectSteps()
		return r
	}

	r := newRobot()
	one(r, 5e6)
	served := r.Pose()
	only("a run of one sample", r.FinishSteps(), 5e6, served)
	if again := r.FinishSteps(); len(again) != 0 {
		t.Errorf("FinishSteps again: %d steps, want none", len(again))
	}

	r = newRobot()
	one(r, 7e6)
	served = r.Pose()
	r.StartRun(RunStart{BootID: "two"})
	only("run 1 of one sample, at the run start", r.TakeSteps(), 7e6, served)
	feedRun(t, r, 20)
	second := r.FinishSteps()
	if len(second) < 20 || !second[0].Start || second[0].StampNs != 5e6 {
		t.Errorf("run 2 after it: %d steps, the first a start %v at %d", len(second), second[0].Start, second[0].StampNs)
	}

	r = newRobot()
	feedRun(t, r, 20)
	r.StartRun(RunStart{BootID: "two"})
	r.TakeSteps()
	one(r, 3e6)
	served = r.Pose()
	only("run 2 of one sample", r.FinishSteps(), 3e6, served)

	r = newRobot()
	if steps := r.FinishSteps(); len(steps) != 0 {
		t.Errorf("a robot without odometry: %d steps", len(steps))
	}
	r = newRobot()
	feedRun(t, r, 20)
	r.StartRun(RunStart{BootID: "two"})
	r.TakeSteps()
	if steps := r.FinishSteps(); len(steps) != 0 {
		t.Errorf("a run 2 without odometry: %d steps", len(steps))
	}
}
