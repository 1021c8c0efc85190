package fusion

import (
	"fmt"

	"reckon.example/estimator"
)

// Reseed restarts the filter from pose at stampNs with covariance cov (3x3 row-major).
// Inputs stamped before it are no longer accepted; the IMU offset is
// re-initialised from the next IMU sample.
func (r *Robot) Reseed(stampNs int64, pose estimator.Pose, cov []float64) Result {
	if err := checkPose(pose, cov); err != nil {
		return refused(err)
	}
	res := r.next()
	e := entry{kind: entReset, t0: stampNs, t1: stampNs, seq: res.Seq, pose: pose}
	copy(e.poseCov[:], cov)
	e.pose.Heading = estimator.Wrap(pose.Heading)
	switch {
	case !r.started:
		if err := r.f.Reset(e.pose, &e.poseCov); err != nil {
			return r.finish(invalid(res, err))
		}
		r.ready = false
		r.base = checkpoint{est: r.f.State()}
		res.Verdict = VerdictApplied
		res.Events = append(res.Events, Event{Kind: EventReseeded, StampNs: stampNs})
	case stampNs < r.baseT:
		res.Verdict = VerdictTooOld
		res.Err = fmt.Errorf("%w: stamp_ns %d before the window start %d", ErrTooOld, stampNs, r.baseT)
	case stampNs <= r.newest:
		r.insertReset(&e, &res)
	default:
		res = r.addMeasurement(res, &e, "")
	}
	return r.finish(res)
}

// insertReset inserts a reset entry and forgets what came before it.
func (r *Robot) insertReset(e *entry, res *Result) {
	var ins insertion
	r.insert(e, &ins)
	r.dropFront(ins.at + 1)
	r.clearCandidates()
	r.trust.refusedRun = 0
	r.trust.disagree = false
	// A pose set by hand or recovered follows a move the wheels did not
	// see; the turn comparison starts afresh.
	r.restartSlip(res)
	res.Verdict = VerdictApplied
	res.Events = append(res.Events, Event{Kind: EventReseeded, StampNs: e.t1})
}

// checkPose reports what is wrong with a reseed's (or a run start's) pose
// before it is taken, naming the field at fault: pose or covariance.
func checkPose(pose estimator.Pose, cov []float64) error {
	if !finiteAll(pose.X, pose.Y) || !anglesOK(pose.Heading) {
		return FieldErrorf(ErrBadSample, "pose", "%+v is not finite, or its heading not within %g rad of 0", pose, maxAngleRad)
	}
	if !lengthsOK(pose.X, pose.Y) {
		return FieldErrorf(ErrBadSample, "pose", "%+v is not a field position within %g m of the origin", pose, maxFieldM)
	}
	if err := estimator.CheckCovariance(cov, 3); err != nil {
		return FieldErrorf(ErrBadSample, "covariance", "%v", err)
	}
	if err := checkVariances(cov, 3, poseAngle); err != nil {
		return FieldErrorf(ErrBadSample, "covariance", "%v", err)
	}
	return nil
}
