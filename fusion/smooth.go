package fusion

import (
	"fmt"

	"reckon.example/estimator"
)

// Step is one finished step of a run as the filter saw it, the input of
// the Rauch-Tung-Striebel smoother: the prediction to StampNs, the
// estimate after the updates at StampNs, and the Jacobian of the
// prediction. Steps are final once their inputs leave the history window.
type Step struct {
	StampNs int64
	// Pred is the estimate predicted to StampNs, before updates there.
	Pred estimator.State
	// Post is the estimate after the updates at StampNs.
	Post estimator.State
	// F is the Jacobian of the prediction from the previous step's Post,
	// N x N row-major with stride estimator.MaxStates.
	F [estimator.MaxStates * estimator.MaxStates]float64
	// Start marks a step with no predecessor: the start of the robot or of
	// a new run (StartRun, whose steps are stamped on the new clock), or a
	// pose set by hand or by move recovery.
	Start bool
}

// CopyFrom makes s a copy of src. For steps of one state size it copies
// only the parts in use (every entry beyond them is zero in both): a Step
// of 12 states is 3.7 kB, of which a robot of 4 states uses 0.4.
func (s *Step) CopyFrom(src *Step) {
	k := src.Pred.Size()
	if k == 0 || src.Post.Size() != k || s.Pred.Size() != k || s.Post.Size() != k {
		*s = *src
		return
	}
	s.StampNs, s.Start = src.StampNs, src.Start
	s.Pred.CopyFrom(&src.Pred)
	s.Post.CopyFrom(&src.Post)
	end := (k-1)*estimator.MaxStates + k
	copy(s.F[:end], src.F[:end])
}

// appendStep appends a copy of s to dst, reusing the memory past dst's
// length.
func appendStep(dst []Step, s *Step) []Step {
	if len(dst) == cap(dst) {
		return append(dst, *s)
	}
	dst = dst[:len(dst)+1]
	dst[len(dst)-1].CopyFrom(s)
	return dst
}

// stepCollector turns entries leaving the window into steps. Finished
// steps gather in ready, whose memory AppendSteps and SwapSteps keep for
// reuse: a review collects a step per odometry sample, and a Step of 12
// states is 3.7 kB. The step in progress (while open) is built in place in
// the slot just past ready's length (cur), so that finishing it copies
// nothing; handing ready out moves it to the slot of the next buffer.
type stepCollector struct {
	open  bool
	ready []Step
	// restart: a new run began (StartRun); its first step has no
	// predecessor.
	restart bool
	// begun: a step was started at the run's base (start); StartRun
	// clears it. A run whose only odometry is its first sample leaves its
	// base in no entry to collect; endRun gives it its step.
	begun bool
}

// CollectSteps makes the robot keep the steps of its run for smoothing;
// TakeSteps hands them out as they become final.
func (r *Robot) CollectSteps() {
	if r.steps == nil {
		r.steps = &stepCollector{}
	}
}

// TakeSteps returns the steps that became final since the last call.
func (r *Robot) TakeSteps() []Step {
	if r.steps == nil || len(r.steps.ready) == 0 {
		return nil
	}
	out := r.steps.ready
	r.steps.ready = r.steps.keepOpen(nil, out)
	return out
}

// AppendSteps appends the steps that became final since the last call (of
// it or TakeSteps) to dst and returns the extended slice. Unlike TakeSteps
// it keeps the robot's own buffer, so that a caller that reuses dst
// collects a long run's steps without allocating.
func (r *Robot) AppendSteps(dst []Step) []Step {
	if r.steps == nil {
		return dst
	}
	c := r.steps
	for i := range c.ready {
		dst = appendStep(dst, &c.ready[i])
	}
	if n := len(c.ready); c.open && n > 0 {
		c.ready[0].CopyFrom(&c.ready[:n+1][n])
	}
	c.ready = c.ready[:0]
	return dst
}

// ReadySteps returns the number of steps that became final and were not
// taken yet.
func (r *Robot) ReadySteps() int {
	if r.steps == nil {
		return 0
	}
	return len(r.steps.ready)
}

// SwapSteps returns the steps that became final since the last call (of
// it, AppendSteps or TakeSteps) and keeps spare, emptied, for the next
// ones: a caller that passes the slices it is done with back collects a
// long run's steps without copying them again or allocating.
func (r *Robot) SwapSteps(spare []Step) []Step {
	if r.steps == nil {
		return spare[:0]
	}
	out := r.steps.ready
	r.steps.ready = r.steps.keepOpen(spare[:0], out)
	return out
}

// keepOpen returns next (empty) with the step in progress, if any, moved
// from the slot past old's length to the slot past next's.
func (c *stepCollector) keepOpen(next, old []Step) []Step {
	if !c.open {
		return next
	}
	if cap(next) == 0 {
		next = make([]Step, 0, 1)
	}
	next[:1][0].CopyFrom(&old[:len(old)+1][len(old)])
	return next
}

// FinishSteps makes every step of the run final (at its end) and returns
// the ones not yet taken. The robot takes no late samples older than its
// newest odometry afterwards.
func (r *Robot) FinishSteps() []Step {
	if r.steps == nil {
		return nil
	}
	if n := len(r.live()); n > 0 {
		r.dropFront(n)
	}
	r.steps.endRun(r)
	return r.TakeSteps()
}

// endRun makes the run's last step final. A run whose base became no step
// (its first odometry sample was its last: no entry followed it into the
// window) gets one there, with no predecessor: the estimate the robot
// served from that sample on.
func (c *stepCollector) endRun(r *Robot) {
	if r.started && !c.begun {
		c.emit()
		c.restart = false
		c.start(r.baseT, &r.base.est, r.n)
	}
	c.emit()
}

// collect takes the first k live entries, about to be folded into the base.
// The steps are filled in place, each state loaded once from its packed
// checkpoint.
func (c *stepCollector) collect(r *Robot, k int) {
	live := r.live()
	prev := &r.base.est
	if c.restart || !c.open && len(c.ready) == 0 {
		c.emit()
		c.restart = false
		c.start(r.baseT, prev, r.n)
	}
	for i := 0; i < k; i++ {
		e := &live[i]
		switch e.kind {
		case entOdo:
			c.emit()
			// prev is the previous entry's estimate (or the base): emit
			// left the step it may belong to in place, before the new
			// one's slot (if the slot grew ready, in the array before).
			cur := c.next(r.n)
			r.f.Transition(&cur.F, prev, e.step, float64(e.t1-e.t0)*1e-9)
			cur.StampNs, cur.Start = e.t1, false
			r.loadEst(&cur.Pred, &e.after)
			cur.Post.CopyFrom(&cur.Pred)
			c.open = true
		case entMeas:
			cur := c.cur()
			var d float64
			if e.imu && !e.initialised && !e.out.Gated && !e.failed && c.open {
				// Applied, by the entry's own flags: the filter took the
				// step it computed from the same estimate. Recognised by
				// its heading being the reference after it, a failed
				// update that repeated the last applied reading passed
				// too, and took a step the filter had taken back
				// (TestSmootherSkipsFailedGyroStep).
				d, _ = prev.GyroStep(&r.layout, e.meas.R[0], estimator.Wrap(e.meas.Z[0]))
			}
			r.loadEst(&cur.Post, &e.after)
			if d != 0 {
				// The IMU heading moved the offset by the gyro scale
				// times the IMU's turn before its update, a noise-free
				// linear step G = I + d e_offset e_g^T: the step's
				// prediction is G's image (G Pred G^T, G F), as for the
				// landmark block below.
				cur.Pred.GyroTurn(&r.layout, d)
				o, g := r.layout.Offset(), r.layout.GyroScale()
				for j := 0; j < r.n; j++ {
					cur.F[o*estimator.MaxStates+j] += d * cur.F[g*estimator.MaxStates+j]
				}
			}
			if e.seeded && c.open {
				// The landmark block stands for another landmark from
				// here: to the smoother a new state, independent of the
				// one before, which the step's prediction starts at the
				// landmark's prior.
				at := e.meas.LandmarkError
				v := r.lmVar[e.lm-1]
				c4 := [4]float64{v, 0, 0, v}
				cur.Pred.SeedBlock(at, &c4)
				for i := at; i < at+2; i++ {
					for j := 0; j < r.n; j++ {
						cur.F[i*estimator.MaxStates+j] = 0
					}
				}
			}
		case entReset:
			c.emit()
			var s estimator.State
			r.loadEst(&s, &e.after)
			c.start(e.t1, &s, r.n)
		}
		prev = &c.cur().Post
	}
}

// cur returns the slot of the step in progress, past ready's length.
func (c *stepCollector) cur() *Step {
	n := len(c.ready)
	if n == cap(c.ready) {
		c.ready = append(c.ready, Step{})[:n]
	}
	return &c.ready[:n+1][n]
}

// next returns the slot for a new step of n states, cleared unless it
// holds one of that size already (whose entries past n are zero).
func (c *stepCollector) next(n int) *Step {
	s := c.cur()
	if s.Pred.Size() != n || s.Post.Size() != n {
		*s = Step{}
	}
	return s
}

// start opens a step with no predecessor at stampNs, at s.
func (c *stepCollector) start(stampNs int64, s *estimator.State, n int) {
	cur := c.cur()
	cur.StampNs, cur.Pred, cur.Post, cur.Start = stampNs, *s, *s, true
	cur.F = identity(n)
	c.open, c.begun = true, true
}

// emit moves the step in progress, if any, to the finished ones.
func (c *stepCollector) emit() {
	if c.open {
		c.ready = c.ready[:len(c.ready)+1]
		c.open = false
	}
}

// identity returns the n x n identity, row-major with stride
// estimator.MaxStates.
func identity(n int) [estimator.MaxStates * estimator.MaxStates]float64 {
	var f [estimator.MaxStates * estimator.MaxStates]float64
	for i := 0; i < n; i++ {
		f[i*estimator.MaxStates+i] = 1
	}
	return f
}

// StepStore holds a run's steps in order; a long run keeps them on disk.
type StepStore interface {
	Len() int
	Step(i int, dst *Step) error
}

// StateSink receives smoothed estimates by step index.
type StateSink interface {
	SetSmoothed(i int, s *estimator.State) error
}

// GainedSteps is a StepStore that also gives the smoother's gains, worked
// out ahead (by another goroutine, say) with estimator.RTSGain: Gain(k) is
// the transposed gain of step k's Post, step k+1's Pred and step k+1's F,
// or RTSGain's error, or nil and no error for a gain the smoother is to
// work out itself. Smooth asks for it right after Step(k), only when step
// k+1 is not a Start step, and reads it before it asks for another step.
type GainedSteps interface {
	StepStore
	Gain(k int) (*[estimator.MaxStates * estimator.MaxStates]float64, error)
}

// MemSteps is a StepStore in memory.
type MemSteps []Step

// Len returns the number of steps.
func (m MemSteps) Len() int { return len(m) }

// Step copies step i into dst.
func (m MemSteps) Step(i int, dst *Step) error { *dst = m[i]; return nil }

// MemStates is a StateSink in memory.
type MemStates []estimator.State

// SetSmoothed stores s at i.
func (m MemStates) SetSmoothed(i int, s *estimator.State) error { m[i] = *s; return nil }

// Smooth runs the fixed-interval Rauch-Tung-Striebel smoother backwards over
// the steps and hands every smoothed estimate to dst, last first. It holds
// two steps at a time, so a long run's memory is that of its stores.
//
//	C_k   = P_k|k F_k+1^T P_k+1|k^-1
//	x_k|N = x_k|k + C_k (x_k+1|N - x_k+1|k)
//	P_k|N = P_k|k + C_k (P_k+1|N - P_k+1|k) C_k^T
//
// Reference: Rauch, Tung and Striebel, AIAA Journal 3(8), 1965; in this
// form Bar-Shalom, Li and Kirubarajan (2001), section 8.6. Angle
// differences are wrapped; a Start step ends a segment (its predecessor is
// not smoothed through it). From a GainedSteps source it takes the gains
// C_k as given instead of working them out, with the same result to the
// bit.
func Smooth(src StepStore, dst StateSink) error {
	n := src.Len()
	if n == 0 {
		return nil
	}
	// Two steps and two states, swapped rather than copied: a Step of 12
	// states is 3.7 kB.
	var steps [2]Step
	var states [2]estimator.State
	next, cur := &steps[0], &steps[1]
	smoothed, out := &states[0], &states[1]
	gained, _ := src.(GainedSteps)
	if err := src.Step(n-1, next); err != nil {
		return err
	}
	*smoothed = next.Post
	if err := dst.SetSmoothed(n-1, smoothed); err != nil {
		return err
	}
	for k := n - 2; k >= 0; k-- {
		if err := src.Step(k, cur); err != nil {
			return err
		}
		switch {
		case next.Start:
			*out = cur.Post
		case gained != nil:
			ct, err := gained.Gain(k)
			if err == nil && ct == nil {
				err = estimator.RTSStep(out, &cur.Post, &next.Pred, &next.F, smoothed)
			} else if err == nil {
				estimator.RTSStepWithGain(out, &cur.Post, &next.Pred, ct, smoothed)
			}
			if err != nil {
				return fmt.Errorf("smoothing step %d at %d ns: %w", k, cur.StampNs, err)
			}
		default:
			if err := estimator.RTSStep(out, &cur.Post, &next.Pred, &next.F, smoothed); err != nil {
				return fmt.Errorf("smoothing step %d at %d ns: %w", k, cur.StampNs, err)
			}
		}
		if err := dst.SetSmoothed(k, out); err != nil {
			return err
		}
		smoothed, out = out, smoothed
		next, cur = cur, next
	}
	return nil
}
