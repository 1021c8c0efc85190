package fusion

import (
	"fmt"
	"hash/fnv"
	"io"
	"math"
	"slices"

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
	// fixStamp, as the window's odometry has it, with covariance relCov:
	// relW from the steps' white noise, plus relD C relD^T from the
	// calibration's prior covariance C, relD being d(rel)/d(s_f, s_t, b_r).
	// The two parts are kept apart because candidates share them unlike:
	// the white noise only over the stretch their motions have in common,
	// the calibration error over the whole of both (relocate).
	rel        estimator.Pose
	relCov     [9]float64
	relW, relD [9]float64
	// keepOffset: the IMU offset was initialised at the fix.
	keepOffset bool
	// marker is a pose fix's marker key (markerKey; 0: none named).
	marker uint32
	// corrSensor is a landmark fix's sensor (configuration index + 1)
	// when its correlated part is per landmark (markercorr.go; 0: none),
	// and corr that part's covariance, f C (range, bearing).
	corrSensor int32
	corr       [4]float64
}

// isLandmark reports whether c is a landmark fix.
func (c *candidate) isLandmark() bool { return c.meas.Kind != 0 }

// markerKey returns the key by which recovery tells a pose fix's marker
// apart: the 32-bit FNV-1a hash of its name (hash/fnv), 0 for none named
// and never 0 for a name. Two names of one hash count as one marker (among
// a thousand markers, about one chance in nine thousand that any two do:
// n^2/2^33), which delays a recovery and never hastens it. The key holds
// no pointer, as entries must not (entry.after), and fits in the entry's
// padding.
func markerKey(name string) uint32 {
	if name == "" {
		return 0
	}
	h := fnv.New32a()
	io.WriteString(h, name)
	return max(h.Sum32(), 1)
}

// clearCandidates forgets the candidates (an applied fix or a reseed: the
// estimate agrees with a sensor again, or was set anew), and with them the
// wait for another marker.
func (r *Robot) clearCandidates() {
	r.cands = r.cands[:0]
	r.trust.unconfirmed = false
	r.trust.held, r.trust.heldMarker = false, 0
}

// confirmsReseed reports whether an applied pose fix naming marker key k
// ends the hold on a reseed (holdReseed): a fix of another marker, or one
// naming none (a marker of its own), confirms the reseeded pose; another fix
// of the reseed's own marker does not, since a misread marker's fixes agree
// with one another.
func (r *Robot) confirmsReseed(k uint32) bool {
	return !r.trust.held || k == 0 || k != r.trust.heldMarker
}

// firmMarkersShort reports whether the agreeing pose candidates would still
// lack markers (markersShort) were those dropped that name a marker and
// whose carried pose would not be trusted (wouldTrust: the 95% radius or
// the heading standard deviation of implied (+) rel beyond the trust
// limits); the newest is always counted. Carried past the window
// (carryCandidates, leftBehind), a candidate's covariance grows with the
// odometry, and so does what agrees with it: a misread of one marker,
// carried three minutes, agreed with a misread of another 1.5 m from it
// (TestOldMisreadDoesNotConfirmAnother). A pose too uncertain to be
// trusted itself is no confirmation that another marker's is right.
func (r *Robot) firmMarkersShort() bool {
	n := len(r.cands)
	firm := make([]candidate, 0, n)
	for i := range r.cands[:n-1] {
		c := &r.cands[i]
		if c.marker != 0 {
			p, pc := composeCov(c.implied, &c.cov, c.rel, &c.relCov)
			if !r.wouldTrust(p, &pc) {
				continue
			}
		}
		firm = append(firm, *c)
	}
	return r.markersShort(append(firm, r.cands[n-1]))
}

// markersShort reports whether pose candidates that agree would still wait
// for another marker: some name their marker, and the markers, each fix
// naming none counting as one of its own, number fewer than
// recovery.distinct_markers. Candidates that name none wait for nothing,
// as before markers were named.
func (r *Robot) markersShort(set []candidate) bool {
	named, distinct := tallyMarkers(set, nil)
	return len(named) > 0 && distinct < r.cfg.Recovery.DistinctMarkers
}

// tallyMarkers adds to named the different markers that set names and
// returns it with the number of markers in set, each candidate naming none
// counting as one of its own (markersShort's count).
func tallyMarkers(set []candidate, named []uint32) ([]uint32, int) {
	distinct := 0
	for i := range set {
		if k := set[i].marker; k == 0 {
			distinct++
		} else if !slices.Contains(named, k) {
			named = append(named, k)
			distinct++
		}
	}
	return named, distinct
}

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
	c := candidate{stamp: e.t1, fixStamp: e.t1, keepOffset: r.before(at).offsetReady, marker: e.marker}
	meas := e.meas
	if landmark {
		// Folded at each relocation, at the newest bias (relocate). The
		// landmark's survey error goes with it as white: its block may
		// stand for another landmark by then.
		c.meas = meas
		if e.lm != 0 {
			c.meas.LandmarkError, c.meas.LandmarkVar = 0, r.lmVar[e.lm-1]
		}
		if si, ok := r.perLandmarkSensor(e); ok {
			c.setCorr(&r.cfg, si)
		}
	} else {
		st := r.stateThrough(e.t1)
		r.foldBias(&meas, &st)
		sensor := estimator.Pose{X: meas.Z[0], Y: meas.Z[1], Heading: meas.Z[2]}
		c.implied = estimator.Detach(sensor, meas.Mount)
		c.cov = detachCov(c.implied, meas.Mount, &meas.R)
	}
	if !r.addCandidate(c) {
		return
	}
	var pose estimator.Pose
	var cov [9]float64
	var ok, short bool
	var detail string
	if landmark {
		pose, cov, detail, ok, short = r.relocate()
	} else {
		pose, cov, detail, ok, short = r.posesAgree()
	}
	// Agreeing fixes of too few markers do not reseed, but the robot may
	// have been moved, or a marker reads as another on every frame: not
	// trusted until a fix of another marker agrees or one is applied
	// (DEVELOPERS.md, "Design: Trust").
	r.trust.unconfirmed = short
	if !ok {
		return
	}
	newest := &r.cands[len(r.cands)-1]
	// Confirmed only by candidates too uncertain to be trusted, the pose
	// is taken, and held untrusted until a fix of another marker is
	// applied (holdReseed).
	hold := !landmark && r.firmMarkersShort()
	marker := newest.marker
	fp, _ := r.PoseAt(newest.stamp)
	filt := fp.Pose
	jump := math.Hypot(pose.X-filt.X, pose.Y-filt.Y)
	turn := estimator.Wrap(pose.Heading - filt.Heading)
	keep := newest.keepOffset
	if keep && turn*turn > r.headingGate*(cov[8]+fp.Cov[8]) {
		// The fixes put the heading where the IMU's does not: the IMU's
		// zero moved (re-zeroed by the controller, reset by a brown-out,
		// or the robot turned faster than the gyro reads). Kept, the
		// offset would pull the heading back to the IMU's, every later
		// fix would be refused again, and recovery would repeat without
		// end; the offset is learnt again instead (DEVELOPERS.md, "Design:
		// Gating and recovery").
		keep = false
		detail += fmt.Sprintf("; the IMU's heading disagrees by %.2f rad, its offset learnt again", turn)
	}
	// The estimate was wrong: it is not trusted from before the reseed until
	// a fix is applied again (DEVELOPERS.md, "Design: Trust").
	r.trust.disagree = true
	r.trust.evaluate(r, res)
	reset := entry{kind: entReset, t0: newest.stamp, t1: newest.stamp, pose: pose, poseCov: cov, keepOffset: keep}
	if !landmark && newest.fixStamp == e.t1 && e.meas.Bias != [3]int{} {
		// The pose is this fix's, and carries its sensor's bias: the
		// reset keeps that correlation (applyReset).
		reset.meas = e.meas
	}
	var sub Result
	r.insertReset(&reset, &sub)
	r.trust.disagree = true
	if hold {
		r.holdReseed(marker)
		detail += "; confirmed only by candidates too uncertain to be trusted, held untrusted until a fix of another marker is applied"
	}
	r.stats.recoveries++
	res.Events = append(res.Events, Event{Kind: EventMoveRecovered, StampNs: newest.stamp, Value: jump,
		Detail: fmt.Sprintf("%s; pose re-initialised %.2f m and %.2f rad from the estimate", detail, jump, turn)})
}

// stateThrough returns the estimate after the window's entries that end by
// t: what recovery reads at a candidate's stamp. The newest estimate would
// depend on what had come after t by the time the fix came, and a late fix
// would fold another bias than the same fix in stamp order
// (DEVELOPERS.md, "Design: Time ordering and late measurements").
func (r *Robot) stateThrough(t int64) estimator.State {
	return r.before(r.locate(t)).est
}

// holdReseed holds a reseed at a fix of marker key k untrusted
// (move_unconfirmed) until an applied fix confirms it (confirmsReseed).
func (r *Robot) holdReseed(k uint32) {
	r.trust.unconfirmed, r.trust.held, r.trust.heldMarker = true, true, k
}

// foldBias makes m a measurement of the pose alone: a correlated sensor's
// bias (DEVELOPERS.md, "Design: Sensors") leaves h(x) and its mean leaves
// z, and its covariance (the bias block of P, the stationary C of a
// consider state) joins the white R, since a candidate's error is the sum
// of both; a sensor's mount block and a landmark's survey error join R
// through their Jacobians the same way. Without them m is unchanged. st is
// the estimate at the candidate's stamp (stateThrough).
func (r *Robot) foldBias(m *estimator.Measurement, st *estimator.State) {
	d := m.Kind.Dim()
	for i := 0; i < d; i++ {
		bi := m.Bias[i]
		if bi == 0 {
			continue
		}
		m.Z[i] -= st.MeanAt(bi)
		if m.Kind.IsAngle(i) {
			m.Z[i] = estimator.Wrap(m.Z[i])
		}
		for j := 0; j < d; j++ {
			if bj := m.Bias[j]; bj > 0 {
				m.R[i*3+j] += st.At(bi, bj)
			}
		}
	}
	m.Bias = [3]int{}
	if m.MountError == 0 && m.LandmarkError == 0 && m.LandmarkVar == 0 {
		return
	}
	x := make([]float64, r.n)
	for i := range x {
		x[i] = st.MeanAt(i)
	}
	if me := m.MountError; me > 0 {
		// The mount's error (consider states, mean 0) joins R through
		// its Jacobian: R += H_m P_mm H_m^T.
		if _, h, err := m.Predicted(x); err == nil {
			var c [9]float64
			for a := range 3 {
				for b := range 3 {
					c[a*3+b] = st.At(me+a, me+b)
				}
			}
			addThroughJacobian(m, h, r.n, me, 3, c[:])
		}
		m.MountError = 0
	}
	if le, v := m.LandmarkError, m.LandmarkVar; le > 0 || v > 0 {
		// The landmark's survey error (its block's estimate, or white)
		// joins R through its Jacobian, minus the robot position's (the
		// sign squares out); the block's mean moves the landmark.
		if le > 0 {
			m.LandmarkX, m.LandmarkY = m.LandmarkX+x[le], m.LandmarkY+x[le+1]
		}
		m.LandmarkError, m.LandmarkVar = 0, 0
		if _, h, err := m.Predicted(x); err == nil {
			c := [4]float64{v, 0, 0, v}
			if le > 0 {
				c = [4]float64{st.At(le, le), st.At(le, le+1), st.At(le+1, le), st.At(le+1, le+1)}
			}
			addThroughJacobian(m, h, r.n, 0, 2, c[:])
		}
	}
}

// addThroughJacobian adds H_c C H_c^T to m.R: H_c the k columns from col
// of the Jacobian h (Dim() x n, row-major), C the k x k covariance c
// (row-major) of the states or quantities those columns stand for.
func addThroughJacobian(m *estimator.Measurement, h []float64, n, col, k int, c []float64) {
	d := m.Kind.Dim()
	for i := 0; i < d; i++ {
		for j := 0; j < d; j++ {
			var acc float64
			for a := range k {
				for b := range k {
					acc += h[i*n+col+a] * c[a*k+b] * h[j*n+col+b]
				}
			}
			m.R[i*3+j] += acc
		}
	}
}

// addCandidate carries the candidates and c to the newest stamp among them
// and adds c; it drops those left behind (leftBehind) and the oldest beyond
// what recovery needs. It reports whether c was kept.
func (r *Robot) addCandidate(c candidate) bool {
	to := c.stamp
	if n := len(r.cands); n > 0 && r.cands[n-1].stamp > to {
		to = r.cands[n-1].stamp
	}
	if !r.carry(&c, to) {
		return false
	}
	gap := r.candidateGap(c.fixStamp)
	kept := r.cands[:0]
	for _, o := range r.cands {
		if o.isLandmark() == c.isLandmark() && !r.leftBehind(&o, gap) && r.carry(&o, to) {
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
		kept = r.keepMarkers(kept, over, c.isLandmark())
	}
	r.cands = kept
	return true
}

// candidateGap reports whether a refused fix stamped t comes more than
// window_ns after the newest candidate's fix: the refused fixes before it
// are then no evidence beside it (leftBehind).
func (r *Robot) candidateGap(t int64) bool {
	n := len(r.cands)
	return n > 0 && t > r.cands[n-1].fixStamp && uint64(t-r.cands[n-1].fixStamp) > uint64(r.cfg.WindowNs)
}

// leftBehind reports whether candidate o is dropped at a gap of more than
// window_ns before the next refused fix (candidateGap): all are, except,
// while recovery.distinct_markers asks for more than one, pose candidates
// that name a marker. A moved robot's second marker may come into view
// seconds after the first (on the greenhouse simulator, posts 5 m apart
// with no fix between), and the first marker's candidates must still count
// then. The rule reads stamps alone: until session 25 a candidate was
// dropped when the window's start passed it, which a fix 150 ms late
// reaches 150 ms sooner, and a late run recovered from other candidates
// than the same run in stamp order.
func (r *Robot) leftBehind(o *candidate, gap bool) bool {
	return gap && (o.marker == 0 || o.isLandmark() || r.cfg.Recovery.DistinctMarkers <= 1)
}

// carryCandidates carries the candidates whose stamp the window's start is
// to pass (newBase) to that start, so that they can be carried on from
// there when the next refused fix comes, however late it comes: the
// window's start runs with the newest odometry, and a fix 150 ms late
// finds it 150 ms further on than the same fix in stamp order would. The
// window's start is where an entry ended, which it is in either order, so
// the carry gives the same bits as one straight to the next fix (carry).
// Whether they are kept then is the stamps' matter (leftBehind).
func (r *Robot) carryCandidates(newBase int64) {
	for i := range r.cands {
		if c := &r.cands[i]; c.stamp < newBase {
			r.carry(c, newBase)
		}
	}
}

// keepMarkers drops the oldest over of the candidates kept, in fix-stamp
// order, except, for pose fixes, the newest of each marker not among the
// newer ones while those number fewer than recovery.distinct_markers
// (counted as markersShort does: each newer candidate that names none is
// a marker of its own): a marker passed before the next came into view
// still counts for the recovery, at most distinct_markers - 1 candidates
// more than recovery.count. Candidates that name no marker are dropped as
// before, and so is every older one once the newer ones are enough, so
// that a named fix far off (a misread marker) does not stay beside a run
// of fixes that name none and stop its recovery.
func (r *Robot) keepMarkers(kept []candidate, over int, landmark bool) []candidate {
	need := r.cfg.Recovery.DistinctMarkers
	if landmark || need <= 1 {
		return append(kept[:0], kept[over:]...)
	}
	markers, distinct := tallyMarkers(kept[over:], nil)
	// Walk the dropped from the newest back, marking those kept.
	keep := make([]bool, over)
	for i := over - 1; i >= 0 && distinct < need; i-- {
		if k := kept[i].marker; k != 0 && !slices.Contains(markers, k) {
			markers = append(markers, k)
			distinct++
			keep[i] = true
		}
	}
	out := kept[:0]
	for i := range kept {
		if i >= over || keep[i] {
			out = append(out, kept[i])
		}
	}
	return out
}

// carry moves candidate c from its stamp to the later stamp to by the
// window's odometry between them; false if its stamp left the window. The
// motion is extended step by step from where it stood (extendMotion), so
// that carrying it to a stamp b and on to to gives the same bits as
// carrying it to to at once whenever b is where a window entry ends: the
// window's start, to which trim carries the candidates as it moves on
// (carryCandidates), or another candidate's stamp. Which of those a
// candidate passed depends on when fixes arrived; its motion must not
// (DEVELOPERS.md, "Design: Time ordering and late measurements").
func (r *Robot) carry(c *candidate, to int64) bool {
	if c.stamp == to {
		return true
	}
	if r.turnedByHand(c.stamp, to) {
		return false
	}
	if !r.extendMotion(&c.rel, &c.relW, &c.relD, c.stamp, to) {
		return false
	}
	c.relCov = r.motionCov(&c.relW, &c.relD)
	c.stamp = to
	return true
}

// turnedByHand reports whether the IMU saw the robot turn over [ta, tb]
// while its wheels stood still (wheelsStill): it was being carried or
// turned by hand, and the odometry's motion over the stretch, none with
// no uncertainty, is no carry of a candidate across it. The comparison is
// the slip rule's (turnDisagreement), between the first and the last IMU
// heading of the window in [ta, tb], at its gate. Carried across a carry of
// the orchard carrier, fixes of frames 0.2 s apart counted as seen from
// one place, and the relocation put it where it had been a frame before,
// 0.3 m off with a covariance of a few centimetres (DEVELOPERS.md, "Design:
// Gating and recovery"). Without an absolute IMU and wheels it reports
// false.
func (r *Robot) turnedByHand(ta, tb int64) bool {
	if r.cfg.IMU != IMUAbsolute || len(r.cfg.Wheels) == 0 {
		return false
	}
	live := r.live()
	a, b := -1, -1
	for i := r.locate(ta - 1); i < len(live) && live[i].t1 <= tb; i++ {
		if e := &live[i]; e.kind == entMeas && e.imu && !e.failed && e.t1 >= ta {
			if a < 0 {
				a = i
			}
			b = i
		}
	}
	if a < 0 || live[b].t1 <= live[a].t1 || !r.wheelsStill(live[a].t1, live[b].t1) {
		return false
	}
	var sums wheelSums
	_, _, _, ns, _, _ := r.turnDisagreement(imuAnchor(&live[a]), imuAnchor(&live[b]), &sums)
	r.initTurnGate()
	return ns > r.turnGate
}

// motionCov returns a relative motion's covariance from its white part w
// and its Jacobian d in the calibration: w + d C d^T, C the calibration's
// prior covariance.
func (r *Robot) motionCov(w, d *[9]float64) [9]float64 {
	cal := r.priorCalibration()
	out := *w
	if cal.on {
		var c [9]float64
		estimator.Sandwich(&c, d, &cal.cov)
		for k := range out {
			out[k] += c[k]
		}
	}
	return out
}

// extendMotion extends the robot's motion rel from a stamp t0 to ta, in
// its body frame at t0, to tb by the window's odometry over [ta, tb], with
// the covariance cov of the steps' noise propagated through the arc model
// (DEVELOPERS.md, "Design: Motion prediction"): C' = Fx C Fx^T + Fu Cu
// Fu^T, plus the heading random walk. Being a motion in the body frame, it
// does not depend on the field frame. With calibration states each step is
// the calibrated one, (s_f a, s_f b, s_t dth + b_r dt) at the calibration's
// prior (priorCalibration), and the motion's Jacobian in the calibration is
// jc (accumulated as dRel' = Fx dRel + Fu dStep; zero without calibration
// states), so that the motion's whole covariance is cov + jc C_cal jc^T
// (motionCov). From the zero motion it is the motion over [ta, tb]; from
// the motion over [t0, ta] it is the one over [t0, tb] (the arc model
// composes: "Design: Motion prediction"). It changes nothing and returns
// false when ta is before the window.
func (r *Robot) extendMotion(rel *estimator.Pose, cov, jc *[9]float64, ta, tb int64) bool {
	if ta < r.baseT || tb > r.newest || tb < ta {
		return false
	}
	live := r.live()
	first := r.locate(ta)
	cal := r.priorCalibration()
	// jc is d(rel)/d(s_f, s_t, b_r), 3x3 row-major.
	for i := first; i < len(live) && live[i].t0 < tb; i++ {
		e := &live[i]
		lo, hi := max(e.t0, ta), min(e.t1, tb)
		if e.kind != entOdo || hi <= lo {
			continue
		}
		f := float64(hi-lo) / float64(e.t1-e.t0)
		raw := e.step.Scale(f)
		dtS := float64(hi-lo) * 1e-9
		step := cal.step(raw, dtS)
		var fx, fu, cu, a, b [9]float64
		for k := range cu {
			cu[k] = e.cov[k] * f
		}
		cal.scaleCov(&cu)
		estimator.ArcJacobians(*rel, step, &fx, &fu)
		estimator.Sandwich(&a, &fx, cov)
		estimator.Sandwich(&b, &fu, &cu)
		for k := range cov {
			cov[k] = a[k] + b[k]
		}
		if cal.on {
			// d(step)/d(s_f, s_t, b_r) = [a 0 0; b 0 0; 0 dth dt].
			ds := [9]float64{raw.ForwardM, 0, 0, raw.LeftM, 0, 0, 0, raw.TurnRad, dtS}
			var x, y [9]float64
			mul3(&x, &fx, jc)
			mul3(&y, &fu, &ds)
			for k := range jc {
				jc[k] = x[k] + y[k]
			}
		}
		// The heading random walk over the stretch (Design: Process noise).
		cov[8] += r.cfg.HeadingDriftVarPerS() * dtS
		*rel = estimator.Advance(*rel, step)
	}
	return true
}

// calibration is the odometry calibration of the estimate at one point of
// the window: the scales s_f, s_t and the heading-rate bias b_r (1, 1 and 0
// where the layout lacks them), with their covariance cov over (s_f, s_t,
// b_r).
type calibration struct {
	on         bool
	sf, st, br float64
	cov        [9]float64
}

// priorCalibration returns the configured prior of the odometry
// calibration (DEVELOPERS.md, "Design: State"): scales 1 and rate bias 0,
// with the prior variances. Recovery and the slip rule judge the window's
// odometry with it rather than with the estimate: they decide at a
// sample's arrival, and a decision that read the estimate would depend on
// which fixes had arrived by then, so that late inputs would no longer
// equal stamp order (TestLateEqualsStampOrder). The prior covers the
// calibration error the estimate would have corrected, a little
// conservatively.
func (r *Robot) priorCalibration() calibration {
	c := calibration{sf: 1, st: 1}
	k := &r.cfg.Calibration
	if r.layout.ForwardScale() >= 0 {
		c.cov[0], c.cov[4] = k.ScaleStd*k.ScaleStd, k.ScaleStd*k.ScaleStd
		c.on = true
	}
	if r.layout.RateBias() >= 0 {
		c.cov[8] = k.RateBiasStdRadPerS * k.RateBiasStdRadPerS
		c.on = true
	}
	return c
}

// step returns the calibrated step of a reported step over dtS seconds.
func (c *calibration) step(u estimator.Step, dtS float64) estimator.Step {
	return estimator.Step{ForwardM: c.sf * u.ForwardM, LeftM: c.sf * u.LeftM, TurnRad: c.st*u.TurnRad + c.br*dtS}
}

// scaleCov turns a reported step's covariance into the calibrated step's:
// diag(s_f, s_f, s_t) cu diag(s_f, s_f, s_t).
func (c *calibration) scaleCov(cu *[9]float64) {
	s := [3]float64{c.sf, c.sf, c.st}
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			cu[i*3+j] *= s[i] * s[j]
		}
	}
}

// mul3 writes a b into dst (3x3 row-major).
func mul3(dst, a, b *[9]float64) {
	for i := 0; i < 3; i++ {
		for j := 0; j < 3; j++ {
			dst[i*3+j] = a[i*3]*b[j] + a[i*3+1]*b[3+j] + a[i*3+2]*b[6+j]
		}
	}
}

// composeCov returns a (+) b and its covariance Ja ca Ja^T + Jb cb Jb^T for
// independent a and b, with Ja = [1 0 -(sa bx + ca by); 0 1 ca bx - sa by;
// 0 0 1] and Jb = blockdiag(R(a.Heading), 1), the Jacobians of Compose.
func composeCov(a estimator.Pose, ca *[9]float64, b estimator.Pose, cb *[9]float64) (estimator.Pose, [9]float64) {
	ja, jb := composeJacobians(a, b)
	var x, y, out [9]float64
	estimator.Sandwich(&x, &ja, ca)
	estimator.Sandwich(&y, &jb, cb)
	for k := range out {
		out[k] = x[k] + y[k]
	}
	return estimator.Compose(a, b), out
}

// composeJacobians returns the Jacobians of Compose(a, b) in a and in b:
// Ja = [1 0 -(sa bx + ca by); 0 1 ca bx - sa by; 0 0 1] and Jb =
// blockdiag(R(a.Heading), 1).
func composeJacobians(a, b estimator.Pose) (ja, jb [9]float64) {
	s, c := math.Sincos(a.Heading)
	return [9]float64{1, 0, -(s*b.X + c*b.Y), 0, 1, c*b.X - s*b.Y, 0, 0, 1}, [9]float64{c, -s, 0, s, c, 0, 0, 0, 1}
}

// posesAgree reports whether the pose candidates (the last recovery.count,
// and older ones of other markers that keepMarkers kept) agree on the
// robot's pose at the newest one's stamp, and returns that pose; short
// reports candidates that agree but come from too few markers
// (markersShort), which are not taken (ok false).
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
func (r *Robot) posesAgree() (pose estimator.Pose, cov [9]float64, detail string, ok, short bool) {
	n := len(r.cands)
	if n < r.cfg.Recovery.Count {
		return estimator.Pose{}, [9]float64{}, "", false, false
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
			return estimator.Pose{}, [9]float64{}, "", false, false
		}
	}
	if r.markersShort(r.cands) {
		return estimator.Pose{}, [9]float64{}, "", false, true
	}
	detail = fmt.Sprintf("%d agreeing pose fixes refused", n)
	if m := namedMarkers(r.cands); m > 0 {
		detail += fmt.Sprintf(", of %d named markers", m)
	}
	return ln, lc, detail, true, false
}

// namedMarkers counts the different markers the candidates name.
func namedMarkers(set []candidate) int {
	named, _ := tallyMarkers(set, nil)
	return len(named)
}

// detachCov returns the covariance of Detach(s, m) for a sensor pose s with
// covariance rs (3x3, stride 3): J rs J^T, with J the Jacobian of Detach in s.
func detachCov(robot, m estimator.Pose, rs *[9]float64) [9]float64 {
	j := detachJacobian(robot, m)
	var out [9]float64
	estimator.Sandwich(&out, &j, rs)
	return out
}

// detachJacobian returns the Jacobian of Detach(s, m) in the sensor pose s,
// at the robot pose Detach gave (3x3 row-major).
func detachJacobian(robot, m estimator.Pose) [9]float64 {
	sh, ch := math.Sincos(robot.Heading)
	// robot = s_xy - R(s_h - m_h) m_xy, robot_h = s_h - m_h.
	return [9]float64{
		1, 0, sh*m.X + ch*m.Y,
		0, 1, -(ch*m.X - sh*m.Y),
		0, 0, 1,
	}
}

// applyReset applies reset entry e to the filter. A move recovery from a
// fix of a sensor with correlated errors (e.meas set) keeps the pose's
// correlation with the sensor's bias: the pose is the fix's, less the
// bias's mean, so its error is minus the bias's (DEVELOPERS.md, "Design:
// Gating and recovery"). Were that correlation dropped, the sensor's next
// fixes, which repeat the bias, would pull the pose onto it as news.
func (r *Robot) applyReset(e *entry) error {
	if err := r.f.Reset(e.pose, &e.poseCov); err != nil {
		return err
	}
	if e.meas.Kind == estimator.KindPose && e.meas.Bias != [3]int{} {
		j := detachJacobian(e.pose, e.meas.Mount)
		// Not positive definite leaves the pose uncorrelated, as before.
		_ = r.f.CorrelateBias(e.meas.Bias, &j)
	}
	return nil
}
