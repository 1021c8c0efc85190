package fusion

import (
	"fmt"
	"math"

	"gonum.org/v1/gonum/stat/distuv"

	"reckon.example/estimator"
)

// finish evaluates trust after an input and appends its transitions.
func (r *Robot) finish(res Result) Result {
	r.trust.evaluate(r, &res)
	return res
}

// TrustReason is a set of reasons not to trust the estimate.
type TrustReason uint16

const (
	// TrustNoOdometry: no odometry has arrived yet.
	TrustNoOdometry TrustReason = 1 << iota
	// TrustPositionUncertain: the 95% position radius is above
	// trust.max_position95_m.
	TrustPositionUncertain
	// TrustHeadingUncertain: the heading standard deviation is above
	// trust.max_heading_std_rad.
	TrustHeadingUncertain
	// TrustInconsistent: the NIS sum of the last trust.nis_window applied
	// fixes, or of the last trust.nis_window IMU headings, rose above its
	// trust.consistency_probability chi-square quantile and has not yet
	// fallen back to its median: the covariance claims more than the
	// sensors bear out.
	TrustInconsistent
	// TrustFixesRefused: trust.refused_in_a_row fixes in a row were gated:
	// the robot may have been moved.
	TrustFixesRefused
	// TrustNumericalFault: the last update failed numerically.
	TrustNumericalFault
	// TrustFixDisagrees: a fix (pose, position, heading or landmark; IMU
	// excluded) was refused with a NIS beyond the chi-square quantile at
	// DisagreeProbability (unless another fix of its sensor at the same
	// stamp was applied), or two were refused in a row, or a move recovery
	// reseeded the pose, and no fix has been applied since: the estimate is
	// far from where a sensor says the robot is.
	TrustFixDisagrees
	// TrustIMUUnchanged: the IMU's newest headings all read exactly the
	// same while the wheels turned by frozenTurnRad or more (imu_mode
	// absolute): a frozen IMU whose driver repeats its last value, which
	// the heading then follows, or wheels that turned while the robot did
	// not (a wheel off the floor, or spinning) beside an IMU that holds
	// its heading exactly while it senses no rotation.
	TrustIMUUnchanged
	// TrustMoveUnconfirmed: refused pose or landmark fixes agree on a pose
	// the estimate is not at, but from fewer markers than
	// recovery.distinct_markers, so move recovery waits for a fix of
	// another marker: the robot may have been moved, or one marker may read
	// as another on every frame. An applied fix or a reseed ends it. It
	// also stands after a reseed that only candidates too uncertain to be
	// trusted themselves confirmed, until a fix naming another marker than
	// the reseed's, or none, is applied (holdReseed).
	TrustMoveUnconfirmed
)

// DisagreeProbability is the chi-square probability beyond which one refused
// fix's NIS raises TrustFixDisagrees: a consistent filter sees such a NIS
// once in a thousand fixes, about once in 100 s at 10 Hz (DEVELOPERS.md,
// "Design: Trust").
const DisagreeProbability = 1 - 1e-3

type trustState struct {
	reasons    TrustReason
	refusedRun int
	fault      bool
	// disagree: a refused fix's NIS was beyond the DisagreeProbability
	// quantile, or a move recovery reseeded the pose, and no fix has been
	// applied since.
	disagree bool
	// disagreeNIS caches the quantiles by dimension (0: not yet computed).
	disagreeNIS [4]float64

	// The NIS of recent applied fixes and, apart (they come ten times as
	// often and would fill one window), of recent IMU headings; and the
	// recent fixes' scores for a shared offset (bias.go).
	fixes, imu nisWindow
	bias       biasWindow
	// frozen: TrustIMUUnchanged was raised while the IMU read frozenZ,
	// and no IMU heading that differs from it has come since
	// (imufrozen.go).
	frozen  bool
	frozenZ float64
	// unconfirmed: the candidates agree on a pose but come from fewer
	// markers than recovery.distinct_markers (considerRecovery), or a
	// reseed is held: held, taken at a fix of marker heldMarker and
	// confirmed only by candidates too uncertain to be trusted, until a
	// fix of another marker is applied (holdReseed).
	unconfirmed bool
	held        bool
	heldMarker  uint32
}

// The IMU window holds imuWindowFactor times as many headings as the fix
// window holds fixes and tests at a false-alarm probability imuRateFactor
// times smaller, because IMU headings come about ten times as often (100 Hz
// against 10 Hz): that keeps its false alarms per second near the fix
// window's, while a heading jump (the robot turned by hand, a wheel
// slipping) still stands out of it at once (TestTrustInconsistent).
const (
	imuWindowFactor = 5
	imuRateFactor   = 10
)

// nisWindow is a ring of recent NIS values with their dimensions, and
// whether it has raised inconsistent.
type nisWindow struct {
	nis       []float64
	dims      []int
	pos, fill int
	raised    bool
	changed   bool           // since the last check
	bounds    map[int]bounds // by the window's total dimension
	// dof is the sum of dims, kept as they change, and last the bounds of
	// the last check with its dof (lastOK: there was one): at every IMU
	// heading the check read the window's dimensions and the map, each a
	// few cache misses at robot rates (BenchmarkRobotRates).
	dof     int
	last    bounds
	lastDof int
	lastOK  bool
}

func (w *nisWindow) init(n int) {
	w.nis, w.dims = make([]float64, n), make([]int, n)
}

func (w *nisWindow) add(nis float64, dim int) {
	if w.nis == nil {
		return
	}
	w.dof += dim - w.dims[w.pos]
	w.nis[w.pos], w.dims[w.pos] = nis, dim
	w.pos = (w.pos + 1) % len(w.nis)
	if w.fill < len(w.nis) {
		w.fill++
	}
	w.changed = true
}

// bounds are the chi-square quantiles of a window's NIS sum: above hi it
// raises inconsistent, at or below lo (the median) it clears it.
type bounds struct{ hi, lo float64 }

// check tests a full window's sum against the chi-square quantile at p of
// its total dimension, with hysteresis: once raised, the window holds
// inconsistent until its sum is back to the median, so that the flag does
// not flap at the threshold.
func (w *nisWindow) check(p float64) bool {
	if !w.changed || w.fill < len(w.nis) {
		return w.raised
	}
	w.changed = false
	var sum float64
	for i := range w.nis {
		sum += w.nis[i]
	}
	dof := w.dof
	q, ok := w.last, w.lastOK && w.lastDof == dof
	if !ok {
		q, ok = w.bounds[dof]
	}
	if !ok {
		c := distuv.ChiSquared{K: float64(dof)}
		q = bounds{hi: c.Quantile(p), lo: c.Quantile(0.5)}
		if w.bounds == nil {
			w.bounds = map[int]bounds{}
		}
		w.bounds[dof] = q
	}
	w.last, w.lastDof, w.lastOK = q, dof, true
	w.raised = sum > q.hi || (w.raised && sum > q.lo)
	return w.raised
}

// evaluate recomputes the reasons and reports transitions as events.
func (t *trustState) evaluate(r *Robot, res *Result) {
	if t.fixes.nis == nil {
		t.fixes.init(r.cfg.Trust.NISWindow)
		t.imu.init(imuWindowFactor * r.cfg.Trust.NISWindow)
		t.bias.init(r.cfg.Trust.NISWindow)
	}
	var now TrustReason
	// Read in place: a copy of the estimate (1.3 kB) at every input cost
	// more cache misses than the rest of this (BenchmarkRobotRates).
	if !r.started {
		now |= TrustNoOdometry
	}
	if r.f.Position95() > r.cfg.Trust.MaxPosition95M {
		now |= TrustPositionUncertain
	}
	if math.Sqrt(r.f.Var(2)) > r.cfg.Trust.MaxHeadingStdRad {
		now |= TrustHeadingUncertain
	}
	p := r.cfg.Trust.ConsistencyProbability
	if fix, imu, bias := t.fixes.check(p), t.imu.check(1-(1-p)/imuRateFactor), t.bias.check(p); fix || imu || bias {
		now |= TrustInconsistent
	}
	if t.refusedRun >= r.cfg.Trust.RefusedInARow {
		now |= TrustFixesRefused
	}
	if t.fault {
		now |= TrustNumericalFault
	}
	if t.disagree {
		now |= TrustFixDisagrees
	}
	if t.imuFrozen(r) {
		now |= TrustIMUUnchanged
	}
	if t.unconfirmed {
		now |= TrustMoveUnconfirmed
	}
	stamp := r.newest
	switch {
	case now != 0 && t.reasons == 0:
		res.Events = append(res.Events, Event{Kind: EventTrustLost, StampNs: stamp, Detail: now.String()})
	case now == 0 && t.reasons != 0:
		res.Events = append(res.Events, Event{Kind: EventTrustRegained, StampNs: stamp})
	case now != t.reasons && now != 0:
		res.Events = append(res.Events, Event{Kind: EventTrustLost, StampNs: stamp, Detail: fmt.Sprintf("%s (was %s)", now, t.reasons)})
	}
	t.reasons = now
}

// noteRefused counts a refused fix (IMU headings excluded) and raises
// disagree when its NIS is beyond the DisagreeProbability quantile, unless
// frameApplied: another fix of the sensor at the same stamp (of the same
// camera frame: another marker) was applied, so the estimate agrees with
// what the sensor saw then, and the refused fix is the sensor's outlier,
// not news that the robot moved.
func (t *trustState) noteRefused(out estimator.Outcome, frameApplied bool) {
	t.refusedRun++
	if frameApplied || out.Dim < 1 || out.Dim >= len(t.disagreeNIS) {
		return
	}
	if t.disagreeNIS[out.Dim] == 0 {
		t.disagreeNIS[out.Dim] = distuv.ChiSquared{K: float64(out.Dim)}.Quantile(DisagreeProbability)
	}
	// Two refused in a row happen to a consistent filter once in 1/(1 -
	// gate_probability)^2 fixes (10,000 at 0.99): the estimate has likely
	// moved off.
	if !(out.NIS <= t.disagreeNIS[out.Dim]) || t.refusedRun >= 2 {
		t.disagree = true
	}
}

// frameApplied reports whether the window holds an applied fix of the
// sensor of live entry at, at the same stamp: another marker of the same
// camera frame (noteRefused).
func (r *Robot) frameApplied(at int) bool {
	live := r.live()
	e := &live[at]
	applied := func(o *entry) bool {
		return o.kind == entMeas && !o.imu && o.sensor == e.sensor && !o.out.Gated && !o.failed
	}
	for i := at - 1; i >= 0 && live[i].t1 == e.t1; i-- {
		if applied(&live[i]) {
			return true
		}
	}
	for i := at + 1; i < len(live) && live[i].t1 == e.t1; i++ {
		if applied(&live[i]) {
			return true
		}
	}
	return false
}

// noteApplied notes an applied fix (IMU headings excluded): the refused run,
// a numerical fault and a disagreement are over.
func (t *trustState) noteApplied() {
	t.refusedRun = 0
	t.fault = false
	t.disagree = false
}
