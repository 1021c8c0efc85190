package fusion

import (
	"fmt"
	"math"

	"reckon.example/estimator"
)

// candidate is a refused pose or landmark fix kept as evidence that the
// robot was moved, carried to the stamp of the newest candidate by the
// odometry between (DEVELOPERS.md, "Design: Gating and recovery").
type candidate struct {
	// stamp is the stamp the candidate is carried to; fixStamp the fix's own.
	stamp, fixStamp int64
	// implied is the robot pose a pose fix implies at fixStamp, with its
	// covariance cov (3x3); zero for a landmark fix.
	implied estimator.Pose
	cov     [9]float64
	// meas is a landmark fix's measurement; Kind 0 for a pose fix.
	meas estimator.Measurement
	// rel is the robot's motion from fixStamp to stamp in the body frame at
	// fixStamp, as the window's odometry has it, with covariance relCov.
	rel    estimator.Pose
	relCov [9]float64
	// keepOffset: the IMU offset was initialised at the fix.
	keepOffset bool
}

// isLandmark reports whether c is a landmark fix.
func (c *candidate) isLandmark() bool { return c.meas.Kind != 0 }

// maxLandmarkCandidates bounds the refused landmark fixes kept for a
// relocation: a few seconds of one camera.
const maxLandmarkCandidates = 24

// considerRecovery keeps a refused pose or landmark fix as a candidate and
// re-initialises the pose when the candidates agree on one: for pose fixes
// the last recovery.count agree pairwise, for landmark fixes a pose solved
// from them fits them all (DEVELOPERS.md, "Design: Gating and recovery").
// at is the fix's index in the window.
func (r *Robot) considerRecovery(res *Result, at int) {
	e := &r.live()[at]
	kind := e.meas.Kind
	landmark := kind == estimator.KindRangeBearing || kind == estimator.KindRange || kind == estimator.KindBearing
	if !r.cfg.Recovery.Enabled || kind != estimator.KindPose && !landmark {
		return
	}
	c := candidate{stamp: e.t1, fixStamp: e.t1, keepOffset: r.before(at).offsetReady}
	if landmark {
		c.meas = e.meas
	} else {
		sensor := estimator.Pose{X: e.meas.Z[0], Y: e.meas.Z[1], Heading: e.meas.Z[2]}
		c.implied = estimator.Detach(sensor, e.meas.Mount)
		c.cov = detachCov(c.implied, e.meas.Mount, &e.meas.R)
	}
	if !r.addCandidate(c) {
		return
	}
	var pose estimator.Pose
	var cov [9]float64
	var ok bool
	var detail string
	if landmark {
		pose, cov, detail, ok = r.relocate()
	} else {
		pose, cov, detail, ok = r.posesAgree()
	}
	if !ok {
		return
	}
	newest := &r.cands[len(r.cands)-1]
	filt, _ := r.estimateAt(newest.stamp)
	jump := math.Hypot(pose.X-filt.X, pose.Y-filt.Y)
	turn := estimator.Wrap(pose.Heading - filt.Heading)
	// The estimate was wrong: it is not trusted from before the reseed until
	// a fix is applied again (DEVELOPERS.md, "Design: Trust").
	r.trust.disagree = true
	r.trust.evaluate(r, res)
	reset := entry{kind: entReset, t0: newest.stamp, t1: newest.stamp, pose: pose, poseCov: cov, keepOffset: newest.keepOffset}
	var sub Result
	r.insertReset(reset, &sub)
	r.trust.disagree = true
	r.stats.recoveries++
	res.Events = append(res.Events, Event{Kind: EventMoveRecovered, StampNs: newest.stamp, Value: jump,
		Detail: fmt.Sprintf("%s; pose re-initialised %.2f m and %.2f rad from the estimate", detail, jump, turn)})
}

// addCandidate carries the candidates and c to the newest stamp among them
// and adds c; it drops those that cannot be carried (their stamp left the
// window) and the oldest beyond what recovery needs. It reports whether c
// was kept.
func (r *Robot) addCandidate(c candidate) bool {
	to := c.stamp
	if n := len(r.cands); n > 0 && r.cands[n-1].stamp > to {
		to = r.cands[n-1].stamp
	}
	if !r.carry(&c, to) {
		return false
	}
	kept := r.cands[:0]
	for _, o := range r.cands {
		if o.isLandmark() == c.isLandmark() && r.carry(&o, to) {
			kept = append(kept, o)
		}
	}
	// Candidates stay in fix-stamp order, so the last is the newest.
	i := len(kept)
	for i > 0 && kept[i-1].fixStamp > c.fixStamp {
		i--
	}
	kept = append(kept, candidate{})
	copy(kept[i+1:], kept[i:])
	kept[i] = c
	limit := r.cfg.Recovery.Count
	if c.isLandmark() {
		limit = max(limit, maxLandmarkCandidates)
	}
	if over := len(kept) - limit; over > 0 {
		kept = append(kept[:0], kept[over:]...)
	}
	r.cands = kept
	return true
}

// carry moves candidate c from its stamp to the later stamp to by the
// window's odometry between them; false if its stamp left the window.
func (r *Robot) carry(c *candidate, to int64) bool {
	if c.stamp == to {
		return true
	}
	m, mc, ok := r.relativeMotion(c.stamp, to)
	if !ok {
		return false
	}
	c.rel, c.relCov = composeCov(c.rel, &c.relCov, m, &mc)
	c.stamp = to
	return true
}

// relativeMotion composes the window's odometry over [ta, tb] into the
// robot's motion in its body frame at ta, with the covariance of the steps'
// noise propagated through the arc model (DEVELOPERS.md, "Design: Motion
// prediction"): C' = Fx C Fx^T + Fu Cu Fu^T, plus the heading random walk.
// Being a motion in the body frame, it does not depend on the field frame.
// ok is false when ta is before the window.
func (r *Robot) relativeMotion(ta, tb int64) (rel estimator.Pose, cov [9]float64, ok bool) {
	if ta < r.baseT || tb > r.newest || tb < ta {
		return rel, cov, false
	}
	live := r.live()
	for i := r.locate(ta); i < len(live) && live[i].t0 < tb; i++ {
		e := &live[i]
		lo, hi := max(e.t0, ta), min(e.t1, tb)
		if e.kind != entOdo || hi <= lo {
			continue
		}
		f := float64(hi-lo) / float64(e.t1-e.t0)
		step := e.step.Scale(f)
		var fx, fu, cu, a, b [9]float64
		for k := range cu {
			cu[k] = e.cov[k] * f
		}
		estimator.ArcJacobians(rel, step, &fx, &fu)
		estimator.Sandwich(&a, &fx, &cov)
		estimator.Sandwich(&b, &fu, &cu)
		for k := range cov {
			cov[k] = a[k] + b[k]
		}
		// The heading random walk over the stretch (Design: Process noise).
		cov[8] += r.cfg.Noise.HeadingVarRad2PerS * float64(hi-lo) * 1e-9
		rel = estimator.Advance(rel, step)
	}
	return rel, cov, true
}

// composeCov returns a (+) b and its covariance Ja ca Ja^T + Jb cb Jb^T for
// independent a and b, with Ja = [1 0 -(sa bx + ca by); 0 1 ca bx - sa by;
// 0 0 1] and Jb = blockdiag(R(a.Heading), 1), the Jacobians of Compose.
func composeCov(a estimator.Pose, ca *[9]float64, b estimator.Pose, cb *[9]float64) (estimator.Pose, [9]float64) {
	s, c := math.Sincos(a.Heading)
	ja := [9]float64{1, 0, -(s*b.X + c*b.Y), 0, 1, c*b.X - s*b.Y, 0, 0, 1}
	jb := [9]float64{c, -s, 0, s, c, 0, 0, 0, 1}
	var x, y, out [9]float64
	estimator.Sandwich(&x, &ja, ca)
	estimator.Sandwich(&y, &jb, cb)
	for k := range out {
		out[k] = x[k] + y[k]
	}
	return estimator.Compose(a, b), out
}

// posesAgree reports whether the last recovery.count pose candidates agree
// on the robot's pose at the newest one's stamp, and returns that pose.
//
// Each candidate i is carried to the newest stamp: P_i = implied_i (+) rel_i,
// with covariance C_i = Ja R_i Ja^T + Jb O_i Jb^T (R_i = J R J^T of the fix,
// O_i the odometry's between the stamps, composeCov). Two candidates agree
// when the difference of the newest pose n and P_i, expressed in n's body
// frame,
//
//	d = (R(-th_n) (P_i,xy - n_xy), wrap(P_i,th - th_n)),
//
// has a Mahalanobis distance d^T S^-1 d with S = B (C_i + C_n) B^T, B =
// blockdiag(R(-th_n), 1), at most the 3-dof chi-square quantile at
// recovery.agree_probability. Moving or turning the field frame moves the
// implied poses alike and leaves the body-frame odometry as it is, so d and
// S, and the decision, do not change: a robot far from the origin recovers
// as one near it.
func (r *Robot) posesAgree() (estimator.Pose, [9]float64, string, bool) {
	n := len(r.cands)
	if n < r.cfg.Recovery.Count {
		return estimator.Pose{}, [9]float64{}, "", false
	}
	last := &r.cands[n-1]
	ln, lc := composeCov(last.implied, &last.cov, last.rel, &last.relCov)
	s, c := math.Sincos(ln.Heading)
	b := [9]float64{c, s, 0, -s, c, 0, 0, 0, 1}
	for i := range r.cands[:n-1] {
		o := &r.cands[i]
		p, pc := composeCov(o.implied, &o.cov, o.rel, &o.relCov)
		dx, dy := p.X-ln.X, p.Y-ln.Y
		d := [3]float64{c*dx + s*dy, -s*dx + c*dy, estimator.Wrap(p.Heading - ln.Heading)}
		var sum, sb [9]float64
		for k := range sum {
			sum[k] = pc[k] + lc[k]
		}
		estimator.Sandwich(&sb, &b, &sum)
		if m, ok := estimator.Mahalanobis(&d, &sb); !ok || m > r.agreeGate {
			return estimator.Pose{}, [9]float64{}, "", false
		}
	}
	return ln, lc, fmt.Sprintf("%d agreeing pose fixes refused", n), true
}

// estimateAt returns the filter's pose at a stamp inside the window.
func (r *Robot) estimateAt(t int64) (estimator.Pose, bool) {
	p, err := r.PoseAt(t)
	return p.Pose, err == nil
}

// detachCov returns the covariance of Detach(s, m) for a sensor pose s with
// covariance rs (3x3, stride 3): J rs J^T, with J the Jacobian of Detach in s.
func detachCov(robot, m estimator.Pose, rs *[9]float64) [9]float64 {
	sh, ch := math.Sincos(robot.Heading)
	// robot = s_xy - R(s_h - m_h) m_xy, robot_h = s_h - m_h.
	j := [9]float64{
		1, 0, sh*m.X + ch*m.Y,
		0, 1, -(ch*m.X - sh*m.Y),
		0, 0, 1,
	}
	var out [9]float64
	estimator.Sandwich(&out, &j, rs)
	return out
}
