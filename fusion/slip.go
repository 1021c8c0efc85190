package fusion

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
)

// Slip that the wheel residual cannot see (DEVELOPERS.md, "Design: Gating
// and recovery"). Three wheels determine the body step exactly, leaving no
// residual; with four, one slipping wheel can hide in the fit. An absolute
// IMU sees the turn on its own: over an interval [a, b] between two IMU
// headings, the wheels' turn W (the window's steps, split by time fraction)
// and the IMU's heading change D, wrap(z_b - z_a) plus the whole turns that
// bring it nearest W (imuTurn: an IMU silent through more than half a turn
// keeps them), differ by
//
//	delta = D - W,   var(delta) = V_w + V_i,   V_i = R_a + R_b + q_o (b - a) + q_r abs(W) + s_g^2 D^2,
//
// with V_w the steps' turn variance plus the heading random walk, R the two
// readings' variances, q_o and q_r the IMU offset's random walks per second
// and per radian, and s_g the gyro scale's prior standard deviation
// (calibration.gyro_scale_std; the zero moves by the gyro scale times D). When delta^2 /
// var(delta) exceeds the 1-dof chi-square quantile at gate_probability
// (corrected for repeated tests, below), the wheels slipped, and the steps' covariances over [a, b] are multiplied by
// the covariance-matching factor k, the one that makes the expected squared
// disagreement equal the one seen: k V_w + V_i = delta^2 (adaptive noise
// estimation from innovations, Mehra, "On the identification of variances
// and adaptive Kalman filtering", IEEE TAC 1970). The IMU's part V_i is
// known, so only the steps' part is scaled. The window is replayed from the
// first of those steps, and slip_suspected is raised.
//
// A slip lasts, and its error does not average out: a wheel slipping for
// 0.8 s shortens every step the same way, and the IMU, which corrects the
// heading, does not see the distance lost. So the matching is over the whole
// slip, not each interval: k is chosen so that the steps' turn variance
// summed since the slip began covers the square of the disagreements summed
// since then (a bias's variance, not a random walk's), and, while the slip
// lasts, each new step's covariance is multiplied by the last k too. The
// slip ends when an interval of turnBaselineNs agrees with the steps' own,
// uninflated variance and disagrees, if at all, the other way (below).
//
// The comparison runs at every IMU heading at least turnMinNs after the
// anchor, over the interval since it; the anchor moves to the heading that
// found a slip (so no disagreement inflates a step twice), or once an
// interval of turnBaselineNs agrees. Between two IMU samples 10 ms apart the
// readings' noise (5 mrad each) hides the few milliradians a slipping wheel
// turns the estimate; a longer interval lets the slip stand out of it.
//
// Testing one growing interval up to turnTests times would raise false
// alarms that often more; each test is therefore made at the gate's
// probability of error divided by turnTests (Bonferroni's correction), so
// that an honest interval raises one with at most the gate's probability.
//
// A slip of a few percent hides in intervals of 0.1 s: a wheel reading 8%
// short turns the estimate 10 to 15 mrad every 0.1 s, two or three
// standard deviations of the comparison, below its gate in every interval
// however long the slip lasts, while the distance it loses grows (found with
// an independent simulator of a warehouse cart on a wet floor: trusted
// outside the 99.9% region for up to 0.8 s with fixes arriving, and
// without them until the next). Its disagreements add up, and the noise
// does not: over 0.8 s the same slip stands five to ten deviations out. So
// beside the short comparison a long one runs from its own anchor, which
// moves once its interval reaches turnHorizonNs to the IMU heading half of
// it before (midAnchor; the intervals overlap by half), or with a slip,
// made at the gate's probability divided by longTurnTests: the sequential
// detection of a change in a mean by its cumulative sum over a window
// (Basseville and Nikiforov, Detection of Abrupt Changes, 1993, sec. 2.2,
// from memory). An honest run raises at most an eighth more false alarms.
//
// The factor is bounded by maxSlipFactor, the whole slip's: a wheel
// slipping 40% for 0.8 s needs about 5e4; a disagreement that needs more
// (an IMU that turned 2.8 rad in 0.125 s while the wheels did not) is no
// slip that wider steps describe, and an unbounded factor, compounded over
// a few intervals, put variances of 1e21 beside ones of 1e-2 into the
// covariance, which then was no longer positive definite in float64
// (FuzzSamples found it).
const (
	maxSlipFactor  = 1e6
	turnMinNs      = 15e6
	turnBaselineNs = 100e6
	turnTests      = turnBaselineNs / 10e6
	turnHorizonNs  = 800e6
	longTurnTests  = 2 * turnHorizonNs / 10e6 // the intervals overlap by half (midAnchor)
)

// slipState is the IMU's slip comparison.
type slipState struct {
	anchor turnAnchor
	// long anchors the long comparison (not set: from the next heading).
	long turnAnchor
	// factor multiplies new steps' covariances while a slip lasts (0: none);
	// turnSum and varSum sum the slip's disagreements (rad) and its steps'
	// turn variance after inflation (rad^2).
	factor, turnSum, varSum float64
}

// turnAnchor is the IMU heading that starts the next turn comparison.
type turnAnchor struct {
	set     bool
	stamp   int64
	heading float64 // rad, the IMU's own frame
	varRad2 float64 // its reading's variance
}

// imuAnchor is the IMU heading of window entry e as a comparison's end.
func imuAnchor(e *entry) turnAnchor {
	return turnAnchor{set: true, stamp: e.t1, heading: e.meas.Z[0], varRad2: e.meas.R[0]}
}

// checkTurn compares the IMU heading of window entry at, just applied, with
// the anchor, as above. It does nothing unless the robot has an absolute
// IMU and wheels.
func (r *Robot) checkTurn(res *Result, at int) {
	if r.cfg.IMU != IMUAbsolute || len(r.cfg.Wheels) == 0 {
		return
	}
	e := &r.live()[at]
	b := imuAnchor(e)
	sl := &r.slip
	if r.longTurn(res, b) {
		return
	}
	a := sl.anchor
	switch {
	case !a.set || b.stamp <= a.stamp || a.stamp < r.baseT:
		sl.anchor = b
		return
	case b.stamp-a.stamp < turnMinNs:
		return
	}
	delta, vw, vi, ns, w, first := r.turnDisagreement(a, b, &r.turnSums[0])
	if first < 0 || !(vw > 0) {
		sl.anchor = b
		return
	}
	dt := float64(b.stamp-a.stamp) * 1e-9
	r.initTurnGate()
	// The covariance-matching factor: of this interval outside a slip, of
	// the slip so far inside one.
	sum, slipping := sl.turnSum+delta, sl.factor > 0
	var k float64
	switch {
	case !slipping && ns > r.turnGate && r.wheelsStill(a.stamp, b.stamp):
		// No slip: see wheelsStill.
	case !slipping && ns > r.turnGate:
		k = (delta*delta - vi) / vw // ns > gate > 1 makes it above 1
	case slipping:
		k = (sum*sum - sl.varSum - vi) / vw
	}
	if k > 1 {
		k = min(k, maxSlipFactor/max(sl.factor, 1))
	}
	if k > 1 {
		r.inflateSteps(first, k)
		sl.anchor, sl.long, sl.turnSum, sl.varSum, sl.factor = b, b, sum, sl.varSum+k*vw, max(sl.factor, 1)*k
		if !slipping || ns > r.turnGate {
			r.slipEvent(res, a, b, w, dt, ns, k)
		}
		return
	}
	if b.stamp-a.stamp < turnBaselineNs {
		return
	}
	// The interval agrees; does it without the slip's inflation? The slip
	// goes on while the interval disagrees beyond the gate without it, or
	// the way the slip went (the sign of its summed disagreement): a slip
	// of a few percent stays under the gate in every interval of 0.1 s,
	// and ended there it went on unseen, while an honest interval points
	// either way with even odds (a sign test), so the factor outlasts a
	// slip that is over by one interval on average.
	vw0 := vw / max(sl.factor, 1)
	if slipping && (delta*sl.turnSum > 0 || delta*delta/(vw0+vi) > r.turnGate) {
		sl.anchor, sl.turnSum, sl.varSum = b, sum, sl.varSum+vw
		return
	}
	if slipping {
		r.endSlip(b.stamp)
	}
	*sl = slipState{anchor: b, long: sl.long}
}

// turnDisagreement returns the IMU's turn less the wheels' over [a, b]
// (delta), the variance of the wheels' part (vw) and of the rest (vi),
// the normalised square ns, the wheels' turn w and the first odometry
// entry of the interval (-1: none); c holds the comparison's sums
// (wheelTurn).
func (r *Robot) turnDisagreement(a, b turnAnchor, c *wheelSums) (delta, vw, vi, ns, w float64, first int) {
	// Standing wheels' steps carry no variance (vw 0), and a stretch
	// without odometry has none (first -1): the comparison still holds,
	// on the IMU's variance alone (turnedByHand); the slip rule's callers
	// leave such stretches alone.
	w, vw, vc, first := r.wheelTurn(a.stamp, b.stamp, c)
	dt := float64(b.stamp-a.stamp) * 1e-9
	d := imuTurn(a, b, w)
	delta = d - w
	vi = a.varRad2 + b.varRad2 + r.cfg.Noise.IMUOffsetVarRad2PerS*dt + r.cfg.Noise.IMUOffsetVarRad2PerRad*math.Abs(w) + vc
	if r.layout.GyroScale() >= 0 {
		// The IMU's zero moved by its gyro scale times its turn d; like
		// the wheels' calibration (wheelTurn), at the scale's prior, so
		// that the decision does not depend on which fixes have arrived.
		g := r.cfg.Calibration.GyroScaleStd
		vi += g * g * d * d
	}
	return delta, vw, vi, delta * delta / (vw + vi), w, first
}

// initTurnGate sets turnGate, the short comparison's chi-square gate with
// 1 degree of freedom, on first use.
func (r *Robot) initTurnGate() {
	if r.turnGate == 0 {
		r.turnGate = distuv.ChiSquared{K: 1}.Quantile(1 - (1-r.cfg.GateProbability)/turnTests)
	}
}

// longTurn runs the long comparison at IMU heading b (see the top of the
// file) and reports whether it found a slip. Inside a slip the short
// comparison follows it, and the long one starts afresh where it ends.
func (r *Robot) longTurn(res *Result, b turnAnchor) bool {
	sl := &r.slip
	a := sl.long
	switch {
	case sl.factor > 0 || !a.set || b.stamp <= a.stamp || a.stamp < r.baseT:
		sl.long = b
		return false
	case b.stamp-a.stamp <= turnBaselineNs:
		return false // the short comparison's
	}
	delta, vw, vi, ns, w, first := r.turnDisagreement(a, b, &r.turnSums[1])
	if first < 0 || !(vw > 0) {
		sl.long = b
		return false
	}
	if r.longTurnGate == 0 {
		r.longTurnGate = distuv.ChiSquared{K: 1}.Quantile(1 - (1-r.cfg.GateProbability)/longTurnTests)
	}
	if ns <= r.longTurnGate || r.wheelsStill(a.stamp, b.stamp) {
		if b.stamp-a.stamp >= turnHorizonNs {
			sl.long = r.midAnchor(a, b)
		}
		return false
	}
	k := min((delta*delta-vi)/vw, maxSlipFactor)
	if !(k > 1) {
		return false
	}
	r.inflateSteps(first, k)
	*sl = slipState{anchor: b, long: b, turnSum: delta, varSum: k * vw, factor: k}
	r.slipEvent(res, a, b, w, float64(b.stamp-a.stamp)*1e-9, ns, k)
	return true
}

// midAnchor returns the long comparison's next anchor once its interval
// [a, b] has reached turnHorizonNs: the IMU heading in the window nearest to
// half the horizon before b (b itself when the window holds none after a),
// so that the intervals overlap by half. Moved to b, the intervals tiled
// time, and a slip that began late in one was summed over the little left
// of it and then from the next one's start: how soon it was seen depended
// on where it fell (a moderate slip's average NEES stayed inside its bound
// or rose 15% above it for 55 ms as the phase moved; TestModerateSlipSeenByIMU).
func (r *Robot) midAnchor(a, b turnAnchor) turnAnchor {
	want := b.stamp - turnHorizonNs/2
	best := b
	live := r.live()
	for i := r.locate(want - turnHorizonNs/4); i < len(live) && live[i].t1 < b.stamp; i++ {
		e := &live[i]
		if e.kind != entMeas || !e.imu || e.t1 <= a.stamp {
			continue
		}
		if d, bd := absNs(e.t1-want), absNs(best.stamp-want); d < bd {
			best = imuAnchor(e)
		}
	}
	return best
}

func absNs(d int64) int64 {
	if d < 0 {
		return -d
	}
	return d
}

// slipEvent counts a slip found over [a, b] and raises slip_suspected.
func (r *Robot) slipEvent(res *Result, a, b turnAnchor, w, dt, ns, k float64) {
	r.stats.slips++
	res.Events = append(res.Events, Event{Kind: EventSlipSuspected, StampNs: b.stamp, Value: ns,
		Detail: fmt.Sprintf("IMU turned %.3f rad, wheels %.3f rad over %.3f s: chi-square %.1f with 1 degree of freedom; step covariance x %.1f",
			imuTurn(a, b, w), w, dt, ns, k)})
}

// imuTurn returns the IMU's turn from anchor a to b: the difference of
// their wrapped headings, unwrapped by the wheels' turn w over [a, b]
// (estimator.Unwrap), the estimate's own turn there, as the gyro scale's
// step unwraps the IMU's turn (estimator.State.GyroStep). Taken wrapped,
// the turn of an IMU silent through more than half a turn (or of a spin
// past pi per long comparison, 3.9 rad/s) lost its whole turns, and good
// wheels were taken for slipping by a whole turn (factor 5e4 to 1e5;
// TestSlipComparisonIMUSilence). Wheels off the IMU by more than half a
// turn over [a, b] are compared off by whole turns: a slip of more than
// half a turn in one interval is seen as a smaller one.
func imuTurn(a, b turnAnchor, w float64) float64 {
	return estimator.Unwrap(estimator.Wrap(b.heading-a.heading), w)
}

// inflateSteps multiplies the covariances of the odometry steps from live
// entry first on by k and replays the window from first. The steps after
// the IMU heading that found the slip are there when the heading came late
// (after the odometry that follows it): in stamp order they would have come
// after it and taken the slip's factor then (slipInflate). They carry the
// factor in force before (every step ending after the last heading compared
// does), so multiplying them by k too gives them the new one: late IMU
// headings equal stamp order.
func (r *Robot) inflateSteps(first int, k float64) {
	r.wheelsChanged(math.MinInt64)
	live := r.live()
	for i := first; i < len(live); i++ {
		if live[i].kind == entOdo {
			scaleStep(&live[i], k)
		}
	}
	r.replayFrom(first)
}

// endSlip takes the slip's factor back from the steps ending after t, the
// stamp of the IMU heading that found the slip over: in stamp order they
// would have come after it, when no slip was in force (see inflateSteps).
func (r *Robot) endSlip(t int64) {
	f := r.slip.factor
	if !(f > 1) {
		return
	}
	r.wheelsChanged(math.MinInt64)
	live := r.live()
	first := -1
	for i := len(live) - 1; i >= 0 && live[i].t1 > t; i-- {
		if live[i].kind == entOdo {
			scaleStep(&live[i], 1/f)
			first = i
		}
	}
	if first >= 0 {
		r.replayFrom(first)
	}
}

// scaleStep multiplies an odometry entry's covariance by k, and the
// factor it carries.
func scaleStep(e *entry, k float64) {
	for j := range e.cov {
		e.cov[j] *= k
	}
	e.scrub *= k // the scrub stays its share of the turn's
	e.slipK = max(e.slipK, 1) * k
}

// slipInflate multiplies a new odometry step's covariance by the factor of
// a slip in progress.
func (r *Robot) slipInflate(e *entry) {
	if f := r.slip.factor; f > 1 {
		for k := range e.cov {
			e.cov[k] *= f
		}
		e.scrub *= f
		e.slipK = f
	}
}

// restartSlip starts the turn comparison afresh after a reset, the first
// live entry: a pose set by hand or recovered follows a move the wheels
// did not see. In stamp order the steps and IMU headings after the reset
// come after it: so the steps after it give back the factor of a slip
// found before it (slipK), and the IMU headings after it are compared
// again, in stamp order, from no anchor, as they would have been had they
// come after the reset; slips found so are raised in res. A reset that
// arrives late, as a recovery decided at a fix 150 ms late does, finds
// those steps and headings in the window already, compared with the
// comparison before the reset and inflated by its slips; kept so, a
// bumped run (whose move by hand the IMU takes for a slip) with its fixes
// 150 ms late ended 0.3 to 2.8 mm from the same run in stamp order
// (TestLateRecoveryEqualsStampOrder).
func (r *Robot) restartSlip(res *Result) {
	r.slip = slipState{}
	r.wheelsChanged(math.MinInt64)
	live := r.live()
	first := -1
	for i := range live {
		if e := &live[i]; e.kind == entOdo && e.slipK != 0 {
			for j := range e.cov {
				e.cov[j] /= e.slipK
			}
			e.scrub /= e.slipK
			e.slipK = 0
			if first < 0 {
				first = i
			}
		}
	}
	if first >= 0 {
		r.replayFrom(first)
	}
	for i := range live {
		if e := &live[i]; e.kind == entMeas && e.imu && !e.failed && !e.out.Gated {
			r.checkTurn(res, i)
		}
	}
}

// stillM and stillRad bound the wheels' travel and turn over an interval
// in which they count as still (wheelsStill): a cart creeping at 1 cm/s
// travels 1 mm in 0.1 s.
const (
	stillM   = 1e-3
	stillRad = 1e-3
)

// wheelsStill reports whether the wheels stood still over [ta, tb]: their
// steps' travel and turn, by time fraction, within stillM and stillRad. A
// disagreement with the IMU over such an interval is no slip (a free-rolling
// wheel that does not turn does not slip; the IMU read noise, a glitch, or
// the robot was turned by hand, which the IMU's heading update and the
// fixes take, and across which recovery carries no candidate,
// turnedByHand): taken as one, its covariance-matching factor, set against
// steps of no motion, came out at the bound, and carried into the steps
// once the robot drove off, it made a robot whose IMU glitched 0.1 s
// before it started distrust its position for seconds (a 95% radius of
// 2.3 m after 2.5 s of driving, against 0.16 m; TestIMUGlitchAtRest).
func (r *Robot) wheelsStill(ta, tb int64) bool {
	var travel, turn float64
	r.odometryOver(ta, tb, func(e *entry, f float64, _ int64) {
		travel += math.Hypot(e.step.ForwardM, e.step.LeftM) * f
		turn += math.Abs(e.step.TurnRad) * f
	})
	return travel <= stillM && turn <= stillRad
}

// odometryOver calls fn with each odometry entry of the window that
// overlaps [ta, tb], the fraction f of its interval inside, and the
// nanoseconds inside, in stamp order, and returns the first one's index
// (-1: none).
func (r *Robot) odometryOver(ta, tb int64, fn func(e *entry, f float64, ns int64)) (first int) {
	first = -1
	live := r.live()
	for i := r.locate(ta); i < len(live) && live[i].t0 < tb; i++ {
		e := &live[i]
		lo, hi := max(e.t0, ta), min(e.t1, tb)
		if e.kind != entOdo || hi <= lo {
			continue
		}
		if first < 0 {
			first = i
		}
		fn(e, float64(hi-lo)/float64(e.t1-e.t0), hi-lo)
	}
	return first
}

// wheelTurn returns the window's odometry turn over [ta, tb] and its
// variance v (the steps' own, by time fraction, plus the heading random
// walk), and the index of the first odometry entry in it (-1: none). With
// calibration states the turn is the calibrated one, s_t dth + b_r dt, at
// the calibration's prior (priorCalibration: the reported turn), and vc is
// the variance the calibration's uncertainty adds, [dth dt] C [dth dt]^T,
// kept apart from the steps' so that a slip's inflation leaves it alone.
//
// c carries the sums of the comparison's earlier calls over the same
// anchor ta (wheelSums), so that a call adds only the steps that came
// since, in the order a walk from ta adds them: the same bits.
func (r *Robot) wheelTurn(ta, tb int64, c *wheelSums) (turn, v, vc float64, first int) {
	if !c.valid(r, ta, tb) {
		*c = wheelSums{set: true, ta: ta, upTo: ta}
	}
	live := r.live()
	first = -1
	for i := r.locate(ta); i < len(live) && live[i].t0 < tb; i++ {
		if e := &live[i]; e.kind == entOdo && max(e.t0, ta) < min(e.t1, tb) {
			first = i
			break
		}
	}
	raw, dtS := c.raw, c.dtS
	v = c.v
	for i := r.locate(c.upTo); i < len(live) && live[i].t0 < tb; i++ {
		e := &live[i]
		lo, hi := max(e.t0, ta), min(e.t1, tb)
		if e.kind != entOdo || hi <= lo {
			continue
		}
		f := float64(hi-lo) / float64(e.t1-e.t0)
		raw += e.step.TurnRad * f
		dtS += float64(hi-lo) * 1e-9
		v += e.cov[8] * f
		if e.t1 <= tb {
			// Whole inside [ta, tb], and so inside every later call's.
			c.upTo, c.raw, c.dtS, c.v = e.t1, raw, dtS, v
		}
	}
	if verifyWheelSums {
		r.checkWheelSums(ta, tb, raw, dtS, v)
	}
	turn = raw
	if first >= 0 {
		if cal := r.priorCalibration(); cal.on {
			turn = cal.st*raw + cal.br*dtS
			v *= cal.st * cal.st
			// [dth dt] C(s_t, b_r) [dth dt]^T.
			vc = raw*raw*cal.cov[4] + 2*raw*dtS*cal.cov[5] + dtS*dtS*cal.cov[8]
		}
	}
	v += r.cfg.Noise.HeadingVarRad2PerS * float64(tb-ta) * 1e-9
	return turn, v, vc, first
}

// wheelSums are one comparison's running sums for wheelTurn: over the
// odometry steps from anchor ta that end by upTo (whole inside every
// interval from ta that the comparison asks about next), the turn raw
// (rad), the time dtS (s) and the turn variance v (rad^2), as a walk
// from ta adds them. The long comparison asks at every IMU heading about
// the 0.1 to 0.8 s since its anchor, and walked all of it each time: 16%
// of the service's own instructions over BenchmarkRatesPath's inputs
// under callgrind (80 M of 500 M, session 22), with every window entry
// read a cache line or two each (560 bytes apart).
//
// The sums stand while no step they cover changes: wheelsChanged ends
// them at every change to entries already in the window before upTo (an
// insertion, which splits the step it falls in, or its taking back, a
// slip's inflation or its end). Appends leave them, and so do entries
// folded into the base, which cover nothing after ta while ta is inside
// the window. At robot rates a late fix ends the long comparison's sums
// about ten times a second, against the hundred IMU headings that ask.
type wheelSums struct {
	set         bool
	ta, upTo    int64
	raw, dtS, v float64
}

// valid reports whether c's sums can be taken for [ta, tb] now.
func (c *wheelSums) valid(r *Robot, ta, tb int64) bool {
	return c.set && c.ta == ta && ta >= r.baseT && tb >= c.upTo
}

// wheelsChanged ends the running sums that cover steps which a change of
// the window at stamp t (or later) may change: a step that ends by upTo
// and contains or follows t.
func (r *Robot) wheelsChanged(t int64) {
	for k := range r.turnSums {
		if t < r.turnSums[k].upTo {
			r.turnSums[k].set = false
		}
	}
}

// verifyWheelSums makes wheelTurn check its running sums against a walk
// from ta, bit for bit (set by the package's tests).
var verifyWheelSums bool

// checkWheelSums panics unless raw, dtS and v are what a walk of the
// window over [ta, tb] adds up.
func (r *Robot) checkWheelSums(ta, tb int64, raw, dtS, v float64) {
	var raw0, dtS0, v0 float64
	r.odometryOver(ta, tb, func(e *entry, f float64, ns int64) {
		raw0 += e.step.TurnRad * f
		dtS0 += float64(ns) * 1e-9
		v0 += e.cov[8] * f
	})
	if raw != raw0 || dtS != dtS0 || v != v0 {
		panic(fmt.Sprintf("fusion: wheel sums over [%d, %d] are turn %v, time %v, variance %v; a walk gives %v, %v, %v", ta, tb, raw, dtS, v, raw0, dtS0, v0))
	}
}
