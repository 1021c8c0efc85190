package fusion

import (
	"errors"
	"fmt"

	"reckon.example/estimator"
)

// ErrRunOutOfOrder marks a run start that does not start the next run: its
// run number is not the one after the current run's, or its boot id is the
// current run's.
var ErrRunOutOfOrder = errors.New("run start out of order")

// RunStart starts a new run of the robot: its controller restarted (its
// clock and counts start again) and the inputs that follow are stamped on
// the new clock (DEVELOPERS.md, "Design: Runs").
type RunStart struct {
	// BootID names the controller boot the run belongs to (a value the
	// controller draws at power-on, a boot counter, or a name given by
	// hand); it must not be empty, and must differ from the current run's.
	BootID string
	// Run is the number of the run this starts: 0 for the next, otherwise
	// exactly the current run's plus one.
	Run uint64
	// Pose and Cov (3x3 row-major, m^2, m*rad, rad^2), when Pose is set,
	// re-seed the new run; otherwise it starts from the pose and
	// covariance the last run ended with.
	Pose *estimator.Pose
	Cov  []float64
}

// Run returns the number of the robot's current run, from 1.
func (r *Robot) Run() uint64 { return r.run + 1 }

// BootID returns the boot id of the current run ("" for the first run,
// which no run start began).
func (r *Robot) BootID() string { return r.bootID }

// StartRun starts a new run (an input, with its sequence number): the
// robot goes on as if created afresh with the last run's estimate as its
// start. The pose with its covariance carries over, and so do the
// odometry scale states with their covariance and their cross-covariance
// with the pose, because they describe the wheels, which a reboot does not
// change, and the gyro scale (calibration.gyro_scale_std), which describes
// the gyro, with them. The IMU offset is initialised again from the next IMU heading (an
// IMU zeroes its heading at power-on), and the heading-rate bias and the
// sensors' bias blocks start again from their priors (a gyro's turn-on bias
// differs from one power-on to the next; a correlated sensor error decays
// over the unknown time the controller was down). Inputs held for odometry
// are resolved too old (their stamps are on the old clock), the history
// window is emptied (its steps become final), and the statistics go on.
// A bad run start is refused and changes nothing.
func (r *Robot) StartRun(s RunStart) Result {
	if err := r.checkRunStart(&s); err != nil {
		return refused(err)
	}
	res := r.next()
	for _, e := range r.held {
		r.stats.count(VerdictTooOld, false)
		if e.kind == entMeas {
			r.stats.sensorVerdict(e.sensor, VerdictTooOld, 0, 0)
		}
		res.Resolved = append(res.Resolved, Resolution{Seq: e.seq, Verdict: VerdictTooOld,
			Err: fmt.Errorf("%w: stamp_ns %d is on the clock of run %d, which ended", ErrTooOld, e.t1, r.Run())})
	}
	if r.steps != nil || r.offsets != nil {
		if n := len(r.live()); n > 0 {
			r.dropFront(n)
		}
	}
	if r.steps != nil {
		r.steps.endRun(r)
		r.steps.restart, r.steps.begun = true, false
	}
	if r.offsets != nil {
		// The run's open visits end with it: the new run's blocks start
		// empty.
		st := r.f.State()
		for b := range r.lmAt {
			r.offsets.visit(r, &st, &r.lm, b, r.newest)
		}
	}
	fresh, err := New(r.cfg)
	if err != nil {
		panic(fmt.Sprintf("fusion: the robot's own configuration is refused: %v", err)) // validated by New
	}
	last := r.f.State()
	st := fresh.f.State()
	carryInto(&st, &last, &fresh.layout, &s)
	fresh.f.SetState(&st)
	fresh.base = checkpoint{est: fresh.f.State()}
	fresh.seq, fresh.stats, fresh.steps, fresh.offsets = r.seq, r.stats, r.steps, r.offsets
	fresh.run, fresh.bootID = r.run+1, s.BootID
	fresh.trust.reasons = r.trust.reasons
	*r = *fresh
	res.Verdict = VerdictApplied
	r.stats.count(VerdictApplied, false)
	res.Events = append(res.Events, Event{Kind: EventRunStarted, Value: float64(r.Run()), Detail: "boot " + s.BootID})
	return r.finish(res)
}

// carryInto puts into st (a fresh robot's prior) what carries over from
// last: the pose, the odometry scales, the gyro scale and their joint
// covariance, or the re-seed's pose and covariance (with the scales kept,
// uncorrelated with the new pose, as Reseed does).
func carryInto(st, last *estimator.State, l *estimator.Layout, s *RunStart) {
	n := st.Size()
	keep := []int{0, 1, 2}
	if i := l.ForwardScale(); i >= 0 {
		keep = append(keep, i, l.TurnScale())
	}
	if i := l.GyroScale(); i >= 0 {
		// The gyro's scale is the gyro's, as the wheels' scales are the
		// wheels': a reboot does not change it (the IMU offset it moves
		// starts afresh).
		keep = append(keep, i)
	}
	x := make([]float64, n)
	p := make([]float64, n*n)
	st.MeanInto(x)
	st.CovarianceInto(p)
	for _, i := range keep {
		x[i] = last.MeanAt(i)
		for _, j := range keep {
			p[i*n+j] = last.At(i, j)
		}
	}
	if s.Pose != nil {
		x[0], x[1], x[2] = s.Pose.X, s.Pose.Y, estimator.Wrap(s.Pose.Heading)
		for i := 0; i < 3; i++ {
			for j := 0; j < n; j++ {
				p[i*n+j], p[j*n+i] = 0, 0
			}
		}
		for i := 0; i < 3; i++ {
			copy(p[i*n:i*n+3], s.Cov[i*3:i*3+3])
		}
	}
	*st = estimator.NewState(n, st.Angles(), x, p)
	if s.Pose == nil && l.TurnScale() >= 0 {
		// The pose and the turn scale keep their covariance, and with it
		// the pose's errors-in-variables moments (State's eiv), which an
		// update's pull correction reads: dropped, the first updates of
		// the run took no pull out. The IMU offset starts afresh, without
		// moments (InitOffset gives them).
		m := last.EIV()
		var kept estimator.EIVMoments
		for a := 0; a < 3; a++ {
			copy(kept[a*estimator.EIVDim:a*estimator.EIVDim+3], m[a*estimator.EIVDim:a*estimator.EIVDim+3])
		}
		st.SetEIV(kept)
	}
	if l.TurnScale() >= 0 {
		// So does the compensation's consider column for the states kept
		// with their covariance (the pose's only without a new pose).
		c := last.EIVConsider()
		var kept [estimator.MaxStates]float64
		for _, i := range keep {
			if i >= 3 || s.Pose == nil {
				kept[i] = c[i]
			}
		}
		st.SetEIVConsider(kept)
	}
}

// checkRunStart reports what is wrong with a run start before it is taken.
func (r *Robot) checkRunStart(s *RunStart) error {
	switch {
	case s.BootID == "":
		return FieldErrorf(ErrBadSample, "boot_id", "is empty: name the controller boot the run belongs to")
	case s.BootID == r.bootID:
		return FieldErrorf(ErrRunOutOfOrder, "boot_id", "%q is the current run's (run %d): that boot's run has started already", s.BootID, r.Run())
	case s.Run != 0 && s.Run <= r.Run():
		return FieldErrorf(ErrRunOutOfOrder, "run", "run %d is not after the current run %d", s.Run, r.Run())
	case s.Run != 0 && s.Run != r.Run()+1:
		return FieldErrorf(ErrRunOutOfOrder, "run", "run %d would skip runs after the current run %d (0 or %d starts the next)", s.Run, r.Run(), r.Run()+1)
	case s.Pose == nil && s.Cov != nil:
		return FieldErrorf(ErrBadSample, "pose", "missing, but a covariance is given")
	case s.Pose != nil:
		if err := checkPose(*s.Pose, s.Cov); err != nil {
			return err // naming pose or covariance
		}
	}
	return nil
}

// restartHint names the remedy when odometry stamped t jumps back further
// than the history window: the controller has likely restarted, and only a
// run start lets its new clock in ("" for a smaller step back, which is
// bad input of the ordinary kind). The robot never starts a run by itself:
// one absurd stamp must stay one refused input (DEVELOPERS.md, "Design:
// Runs").
func (r *Robot) restartHint(t int64) string {
	back := nsAfter(r.newest, t)
	if back <= uint64(r.cfg.WindowNs) {
		return ""
	}
	return fmt.Sprintf("; a jump back of %.3f s, beyond the history window: if the controller restarted, start a new run (a run_start sample, or reckon start-run)", float64(back)*1e-9)
}
