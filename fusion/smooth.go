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

// stepCollector turns entries leaving the window into steps.
type stepCollector struct {
	cur   *Step
	ready []Step
	// restart: a new run began (StartRun); its first step has no
	// predecessor.
	restart bool
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
	if r.steps == nil {
		return nil
	}
	out := r.steps.ready
	r.steps.ready = nil
	return out
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
	if r.steps.cur != nil {
		r.steps.ready = append(r.steps.ready, *r.steps.cur)
		r.steps.cur = nil
	}
	return r.TakeSteps()
}

// collect takes the first k live entries, about to be folded into the base.
func (c *stepCollector) collect(r *Robot, k int) {
	live := r.live()
	prev := r.base
	if c.restart || c.cur == nil && len(c.ready) == 0 {
		c.emit()
		c.restart = false
		c.cur = &Step{StampNs: r.baseT, Pred: prev.est, Post: prev.est, F: identity(r.n), Start: true}
	}
	for i := 0; i < k; i++ {
		e := &live[i]
		after := r.checkpointOf(&e.after)
		switch e.kind {
		case entOdo:
			c.emit()
			s := Step{StampNs: e.t1, Pred: after.est, Post: after.est}
			r.f.Transition(&s.F, &prev.est, e.step, float64(e.t1-e.t0)*1e-9)
			c.cur = &s
		case entMeas:
			c.cur.Post = after.est
		case entReset:
			c.emit()
			c.cur = &Step{StampNs: e.t1, Pred: after.est, Post: after.est, F: identity(r.n), Start: true}
		}
		prev = after
	}
}

func (c *stepCollector) emit() {
	if c.cur != nil {
		c.ready = append(c.ready, *c.cur)
		c.cur = nil
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
// not smoothed through it).
func Smooth(src StepStore, dst StateSink) error {
	n := src.Len()
	if n == 0 {
		return nil
	}
	var next, cur Step
	if err := src.Step(n-1, &next); err != nil {
		return err
	}
	smoothed := next.Post
	if err := dst.SetSmoothed(n-1, &smoothed); err != nil {
		return err
	}
	for k := n - 2; k >= 0; k-- {
		if err := src.Step(k, &cur); err != nil {
			return err
		}
		var out estimator.State
		if next.Start {
			out = cur.Post
		} else {
			if err := estimator.RTSStep(&out, &cur.Post, &next.Pred, &next.F, &smoothed); err != nil {
				return fmt.Errorf("smoothing step %d at %d ns: %w", k, cur.StampNs, err)
			}
		}
		if err := dst.SetSmoothed(k, &out); err != nil {
			return err
		}
		smoothed, next = out, cur
	}
	return nil
}
