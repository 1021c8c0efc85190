package fusion

import (
	"fmt"
	"math"

	"reckon.example/estimator"
)

// candidate is a refused pose fix kept as evidence that the robot was moved.
type candidate struct {
	stamp   int64
	implied estimator.Pose // robot pose the fix implies
	// corr is the correction that maps the filter's pose onto implied, as a
	// field-frame rigid transform (dx, dy, dheading).
	corr estimator.Pose
	cov  [9]float64 // covariance of implied, 3x3
}

// considerRecovery keeps a refused pose fix as a candidate and re-initialises
// the pose when enough consecutive candidates agree (DEVELOPERS.md, "Design: Measurement
// updates"). at is the fix's index in the window.
func (r *Robot) considerRecovery(res *Result, at int) {
	e := &r.live()[at]
	if !r.cfg.Recovery.Enabled || e.meas.Kind != estimator.KindPose {
		return
	}
	filt := r.before(at).est.Pose()
	sensor := estimator.Pose{X: e.meas.Z[0], Y: e.meas.Z[1], Heading: e.meas.Z[2]}
	implied := estimator.Detach(sensor, e.meas.Mount)
	c := candidate{stamp: e.t1, implied: implied, cov: detachCov(implied, e.meas.Mount, &e.meas.R)}
	c.corr.Heading = estimator.Wrap(implied.Heading - filt.Heading)
	s, co := math.Sincos(c.corr.Heading)
	c.corr.X = implied.X - (co*filt.X - s*filt.Y)
	c.corr.Y = implied.Y - (s*filt.X + co*filt.Y)
	r.cands = append(r.cands, c)
	if over := len(r.cands) - r.cfg.Recovery.Count; over > 0 {
		r.cands = append(r.cands[:0], r.cands[over:]...)
	}
	if len(r.cands) < r.cfg.Recovery.Count {
		return
	}
	last := r.cands[len(r.cands)-1]
	for _, o := range r.cands[:len(r.cands)-1] {
		if !agree(o, last, r.agreeGate) {
			return
		}
	}
	jump := math.Hypot(last.implied.X-filt.X, last.implied.Y-filt.Y)
	reset := entry{kind: entReset, t0: last.stamp, t1: last.stamp, pose: last.implied, poseCov: last.cov}
	var sub Result
	r.insertReset(reset, &sub)
	r.stats.recoveries++
	res.Events = append(res.Events, Event{Kind: EventMoveRecovered, StampNs: last.stamp, Value: jump,
		Detail: fmt.Sprintf("%d agreeing fixes refused; pose re-initialised %.2f m and %.2f rad from the estimate", r.cfg.Recovery.Count, jump, last.corr.Heading)})
}

// agree reports whether two candidates' corrections agree within the gate,
// by the Mahalanobis distance with the sum of their covariances.
func agree(a, b candidate, gate float64) bool {
	d := [3]float64{a.corr.X - b.corr.X, a.corr.Y - b.corr.Y, estimator.Wrap(a.corr.Heading - b.corr.Heading)}
	var s [9]float64
	for i := range s {
		s[i] = a.cov[i] + b.cov[i]
	}
	m, ok := estimator.Mahalanobis(&d, &s)
	return ok && m <= gate
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
