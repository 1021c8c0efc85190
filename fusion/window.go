package fusion

import (
	"fmt"
	"slices"
	"sort"

	"reckon.example/estimator"
)

// checkpoint is the filter's estimate after an input, plus whether the IMU
// offset has been initialised since the pose was last set.
type checkpoint struct {
	est         estimator.State
	offsetReady bool
	lm          lmTable
}

type entryKind uint8

const (
	entOdo entryKind = iota + 1
	entMeas
	entReset
)

// entry is one input in the history window, kept in stamp order: odometry
// intervals by their end, measurements and resets at their stamp (after the
// odometry that ends there). Odometry entries do not overlap: each starts
// where the previous one ended, or later after a sample that only set a
// reference (counts or, in rotation mode, the IMU's heading), whose
// interval is a gap in odometry without an entry.
type entry struct {
	kind   entryKind
	t0, t1 int64
	seq    uint64

	// entOdo: the body step over [t0, t1] and its covariance; scrub, the
	// variance added to its turn for rotation the wheels do not see (see
	// wheels below), inflated with cov when a slip inflates the step.
	step  estimator.Step
	cov   [9]float64
	scrub float64
	// slipK is the factor of the IMU's slip comparison that cov and scrub
	// carry (0: none; slip.go), which a reset takes back from the steps
	// after it (restartSlip).
	slipK float64

	// entMeas; lm, the landmark of a landmark fix (from 1), and seeded,
	// that its update gave a landmark block to it (landmarks.go); marker
	// (below) the key of a pose fix's marker.
	meas   estimator.Measurement
	imu    bool
	seeded bool
	lm     int32
	sensor int

	// entReset; keepOffset: a move recovery that keeps the IMU offset (and
	// whether it is initialised) instead of marking it for initialisation.
	pose       estimator.Pose
	poseCov    [9]float64
	keepOffset bool

	// The estimate after this entry (in Robot.cps) and what the update made
	// of it; failed: the update or reset failed, with the error in
	// Robot.errs (so that entries hold no pointers: the window is neither
	// scanned by the garbage collector nor moved under write barriers).
	after  cpSlot
	out    estimator.Outcome
	failed bool
	// initialised: this IMU sample initialised the offset (no NIS).
	initialised bool
	// wheels: an odometry step solved from the wheels (or an IMU turn
	// row), whose report carries their noise: all of cov but scrub
	// (estimator's PredictReported). Beside the other flags, where it
	// takes no padding of its own.
	wheels bool
	// marker is the key of a pose fix's marker (markerKey; 0: none named),
	// in the padding after the flags: the entry is no larger for it.
	marker uint32
}

// live returns the entries in the window.
func (r *Robot) live() []entry { return r.ents[r.head:] }

// locate returns the index of the first live entry ending after t.
//
// Inputs mostly land near the newest entry (an IMU sample within the last
// odometry interval, a fix a few dozen entries back), so it gallops back
// from the end before it bisects: a handful of entries read instead of
// the nine or ten of a bisection of the whole window, each a cache miss
// when the robot has not run for a while (BenchmarkRobotRates). The
// entries' ends do not decrease, so both find the same index.
func (r *Robot) locate(t int64) int {
	live := r.live()
	lo, hi := 0, len(live) // the index is in [lo, hi]
	for step := 1; ; step *= 2 {
		i := hi - step
		if i < 0 {
			break
		}
		if live[i].t1 <= t {
			lo = i + 1
			break
		}
		hi = i
	}
	return lo + sort.Search(hi-lo, func(k int) bool { return live[lo+k].t1 > t })
}

// before returns the checkpoint before live entry i: the base, or a copy
// of the previous entry's in r.cpTmp, valid until the next call.
func (r *Robot) before(i int) *checkpoint {
	if i == 0 {
		return &r.base
	}
	r.loadInto(&r.cpTmp, &r.live()[i-1].after)
	return &r.cpTmp
}

// apply applies e to the filter and stores the checkpoint after it.
func (r *Robot) apply(e *entry) {
	var err error
	switch e.kind {
	case entOdo:
		r.predict(r.f, e)
	case entMeas:
		err = r.applyMeas(e)
	case entReset:
		err = r.applyReset(e)
		if err == nil && !e.keepOffset {
			r.ready = false
		}
	}
	if err != nil || e.failed {
		r.setErr(e.seq, err)
	}
	e.failed = err != nil
	r.storeCheckpoint(&e.after)
}

// entryErr is the error of a failed entry, by its input's sequence number.
type entryErr struct {
	seq uint64
	err error
}

// setErr records the error of entry seq, or forgets it if err is nil.
// Failures are rare, so the list is short.
func (r *Robot) setErr(seq uint64, err error) {
	for i := range r.errs {
		if r.errs[i].seq == seq {
			if err != nil {
				r.errs[i].err = err
				return
			}
			r.errs = slices.Delete(r.errs, i, i+1)
			return
		}
	}
	if err != nil {
		r.errs = append(r.errs, entryErr{seq, err})
	}
}

// errOf returns the recorded error of entry seq.
func (r *Robot) errOf(seq uint64) error {
	for _, e := range r.errs {
		if e.seq == seq {
			return e.err
		}
	}
	return nil
}

// predict moves filter f by odometry entry e with its time-driven noise.
func (r *Robot) predict(f *estimator.Filter, e *entry) {
	var q [estimator.MaxStates]float64
	dt := float64(e.t1-e.t0) * 1e-9
	r.processNoise(&q, e.step, dt)
	if !e.wheels || r.layout.TurnScale() < 0 {
		// Only a turn scale has moments for the report's noise to move.
		f.Predict(e.step, &e.cov, dt, &q)
		return
	}
	rep := e.cov
	rep[8] -= e.scrub
	f.PredictReported(e.step, &e.cov, &rep, dt, &q)
}

// replayFrom rewinds the filter to the checkpoint before live entry i and
// applies every entry from i on.
func (r *Robot) replayFrom(i int) {
	live := r.live()
	if i == 0 {
		r.f.SetState(&r.base.est)
		r.ready = r.base.offsetReady
		r.lm = r.base.lm
	} else {
		r.loadCheckpoint(&live[i-1].after)
	}
	for j := i; j < len(live); j++ {
		r.apply(&live[j])
	}
}

// reserve makes room for n more entries. While the window is still
// filling, and once what it holds spans an eighth of it, the room is what
// the whole window will hold at the rates seen so far, windowSlack+1
// times over (dropFront moves the dropped entries out once they are
// windowSlack times the live ones), up to maxReserve entries: one allocation where growing as
// append does took about ten, each copying the entries before, in the
// robot's first second (BenchmarkRobotRates). Beyond that, or with too
// short a span to tell a rate, it grows as append does.
func (r *Robot) reserve(n int) {
	if len(r.ents)+n <= cap(r.ents) {
		return
	}
	want := len(r.ents) + n
	if span := r.newest - r.baseT; span >= r.cfg.WindowNs/8 && span < r.cfg.WindowNs {
		full := float64(len(r.live())) * float64(r.cfg.WindowNs) / float64(span)
		want = max(want, min((windowSlack+1)*int(full)+64, maxReserve))
	} else if want <= maxReserve {
		// Doubling, as append would, but not past maxReserve: a window
		// of maxWindowEntries (microsecond stamps) then stays within it.
		want = max(want, min(2*cap(r.ents), maxReserve))
	}
	if want > len(r.ents)+n {
		// Not slices.Grow, which may round want up by append's steps.
		ents := make([]entry, len(r.ents), want)
		copy(ents, r.ents)
		r.ents = ents
	}
}

// windowSlack is how many times the live entries the dropped ones may be
// before dropFront moves them out. maxReserve bounds what reserve sets
// aside: room for the most entries a window keeps (maxWindowEntries)
// windowSlack+1 times, 3.5 MB; a window that needs more grows as append
// grows it.
const (
	windowSlack = 2
	maxReserve  = (windowSlack+1)*maxWindowEntries + 64
)

// appendOdo appends an odometry entry ending after every live entry.
func (r *Robot) appendOdo(e *entry) {
	r.reserve(1)
	r.ents = append(r.ents, *e)
	live := r.live()
	r.apply(&live[len(live)-1])
	r.newest = e.t1
}

// heldInside reports whether the first held input is a measurement
// stamped strictly inside odometry entry e, which ends after every live
// entry.
func (r *Robot) heldInside(e *entry) bool {
	return len(r.held) > 0 && r.held[0].kind == entMeas && r.held[0].t1 > e.t0 && r.held[0].t1 < e.t1
}

// appendSplit appends odometry entry e, which ends after every live entry,
// with the first held measurement (heldInside) released into it: e split
// at the measurement's stamp by twist fractions, the measurement between
// the two parts, all three applied from the checkpoint before them, and
// the measurement's resolution added to res. That is what appendOdo and
// then releaseHeld make, bit for bit, without applying e whole first only
// to split it and apply it again: at robot rates an IMU heading stamped
// between two odometry samples (the common case) is held until the second
// comes, and that prediction, its checkpoint and the window's shift were
// about 6% of the robot's instructions (8 M of 135 M over
// BenchmarkRatesPath's inputs under callgrind, session 18).
// TestHeldSplitMatchesInsert checks it against the general path.
func (r *Robot) appendSplit(e *entry, res *Result) {
	h := &r.held[0]
	r.reserve(3)
	i := len(r.live())
	r.ents = append(r.ents, entry{}, *h, entry{})
	n := copy(r.held, r.held[1:])
	r.held[n] = entry{}
	r.held = r.held[:n]
	live := r.live()
	// a and b take slots of their own when applied, as the general path's
	// b does; a keeps its slot as the whole interval's should the
	// measurement be taken back (insertion.original).
	splitOdo(e, live[i+1].t1, &live[i], &live[i+2])
	r.newest = e.t1
	r.replayFrom(i)
	ins := insertion{at: i + 1, split: true, original: *e}
	ins.original.after = live[i].after
	m := &live[i+1]
	sub := Result{Seq: m.seq}
	r.decideMeas(&sub, &ins, r.stats.sensors[m.sensor].ID)
	res.Resolved = append(res.Resolved, Resolution{Seq: sub.Seq, Verdict: sub.Verdict, NIS: sub.NIS, Err: sub.Err})
	res.Events = append(res.Events, sub.Events...)
}

// insertion records how a measurement was inserted, so that it can be
// taken back exactly.
type insertion struct {
	at       int // index of the new entry
	split    bool
	original entry // the odometry entry that was split (when split)
}

// insert puts e (entMeas or entReset, t0 == t1 == stamp) at its stamp,
// splitting the odometry interval that contains it by twist fractions, and
// replays from there; ins records how. The stamp must lie in [baseT,
// newest].
//
// Entries (560 bytes) are passed by pointer and written where they end
// up, not copied through the stack: at robot rates every copy is a few
// more cache misses (BenchmarkRobotRates).
func (r *Robot) insert(e *entry, ins *insertion) {
	t := e.t1
	r.wheelsChanged(t)
	i := r.locate(t)
	live := r.live()
	if i < len(live) && live[i].kind == entOdo && live[i].t0 < t {
		ins.at, ins.split = i+1, true
		ins.original = live[i]
		j := r.open(i+1, 2)
		r.ents[j] = *e
		// a keeps the original's slot; b takes its own when applied.
		splitOdo(&ins.original, t, &r.ents[j-1], &r.ents[j+1])
		r.ents[j+1].after = cpSlot{}
		r.replayFrom(i)
		return
	}
	ins.at, ins.split = i, false
	j := r.open(i, 1)
	r.ents[j] = *e
	r.replayFrom(i)
}

// open makes room for n entries at live index i, moving those from i on
// back (as slices.Insert does), and returns the index in r.ents of the
// first, whose contents are stale.
func (r *Robot) open(i, n int) int {
	r.reserve(n)
	r.ents = slices.Grow(r.ents, n) // when reserve left it to append
	j := r.head + i
	r.ents = r.ents[:len(r.ents)+n]
	copy(r.ents[j+n:], r.ents[j:])
	return j
}

// takeBack removes an inserted entry, merges the interval it split and
// replays, which restores every checkpoint bit for bit.
func (r *Robot) takeBack(ins *insertion) {
	r.wheelsChanged(r.live()[ins.at].t1)
	if e := &r.live()[ins.at]; e.failed {
		r.setErr(e.seq, nil)
	}
	r.freeSlot(&r.live()[ins.at].after)
	if ins.split {
		r.freeSlot(&r.live()[ins.at+1].after)
		r.live()[ins.at-1] = ins.original
		r.ents = slices.Delete(r.ents, r.head+ins.at, r.head+ins.at+2)
		r.replayFrom(ins.at - 1)
		return
	}
	r.ents = slices.Delete(r.ents, r.head+ins.at, r.head+ins.at+1)
	r.replayFrom(ins.at)
}

// splitOdo splits odometry entry e at t0 < t < t1 into two entries a and b
// (either may be nil; neither may be e) whose steps are the twist
// fractions of e's step and whose covariances are the same fractions of
// e's (noise is additive over sub-intervals).
func splitOdo(e *entry, t int64, a, b *entry) {
	f := float64(t-e.t0) / float64(e.t1-e.t0)
	if a != nil {
		*a = *e
		a.t1 = t
		a.step = e.step.Scale(f)
		for k := range e.cov {
			a.cov[k] = e.cov[k] * f
		}
		a.scrub = e.scrub * f
	}
	if b != nil {
		*b = *e
		b.t0 = t
		b.step = e.step.Scale(1 - f)
		for k := range e.cov {
			b.cov[k] = e.cov[k] * (1 - f)
		}
		b.scrub = e.scrub * (1 - f)
	}
}

// trim folds entries that ended before the window into the base
// checkpoint, and the oldest beyond maxWindowEntries.
func (r *Robot) trim() {
	cutoff := r.newest - r.cfg.WindowNs
	live := r.live()
	k := 0
	for k < len(live)-1 && live[k].t1 < cutoff {
		k++
	}
	n := max(k, min(len(live)-maxWindowEntries, len(live)-1))
	if n > 0 && len(r.cands) > 0 {
		r.carryCandidates(live[n-1].t1)
	}
	r.dropFront(n)
}

// maxWindowEntries bounds the history window by its number of entries as
// well as by window_ns: samples stamped microseconds apart (a controller
// that stamps in microseconds but says nanoseconds) would otherwise keep
// a second of them, each entry 560 bytes in memory and about 590 in a
// snapshot. 2048 entries is 6.6 s at 200 Hz odometry, 100 Hz IMU and 10
// Hz fixes, more than the longest window_ns (5 s); past it the window is
// shorter than window_ns, and a late sample before its start is refused as
// too old with the start named. A snapshot then holds at most 1.2 MB of
// window and 0.6 MB of held inputs (max_held at most 1024), which fit in a
// journal record (4 MiB) beside the sessions' verdicts (up to 2 MiB).
const maxWindowEntries = 2048

// dropFront folds the first k live entries into the base checkpoint.
func (r *Robot) dropFront(k int) {
	if k == 0 {
		return
	}
	live := r.live()
	if r.steps != nil {
		r.steps.collect(r, k)
	}
	if r.innov != nil {
		r.innov.collect(r, k)
	}
	if r.offsets != nil {
		r.offsets.collect(r, k)
	}
	for i := range live[:k] {
		if live[i].failed {
			r.setErr(live[i].seq, nil)
		}
	}
	r.foldMarks(live[:k])
	r.loadInto(&r.base, &live[k-1].after)
	for i := range live[:k] {
		r.freeSlot(&live[i].after)
	}
	r.baseT = live[k-1].t1
	r.head += k
	// The dropped entries are moved out once there are twice as many as
	// live ones (and at least 64): each entry is copied half a time on
	// average as it leaves, and the slice stays near three times the
	// window (a window of 1 s at 310 inputs a second is about 170 kB). The
	// room past the live entries is not cleared: entries hold no
	// pointers, and each is written whole when appended. At robot rates
	// the copy and the clearing were 26 of the 1,100 cache lines a sample
	// touches cold, moving each entry once (BenchmarkRatesPathCold under
	// callgrind, session 25). Waiting for 1024 dropped entries, as before
	// that, made a new robot grow the slice to four times the window,
	// reallocating as it went, in its first seconds (BenchmarkRobotRates).
	if r.head >= 64 && r.head >= windowSlack*(len(r.ents)-r.head) {
		n := copy(r.ents, r.ents[r.head:])
		r.ents = r.ents[:n]
		r.head = 0
	}
}

// addMeasurement inserts, holds or refuses a measurement entry.
func (r *Robot) addMeasurement(res Result, e *entry, sensor string) Result {
	t := e.t1
	if seq := r.repeatOf(e); seq != 0 {
		r.stats.count(VerdictInvalid, false)
		return invalid(res, fmt.Errorf("%w: this reading of sensor %q equals input %d in stamp and values: does the sensor send its last reading again? Taken twice, one reading would count as two",
			ErrRepeated, sensor, seq))
	}
	switch {
	case r.started && t < r.baseT:
		res.Verdict = VerdictTooOld
		res.Err = fmt.Errorf("%w: stamp_ns %d is %.3f s before the newest odometry; the window starts at %d", ErrTooOld, t, float64(nsAfter(r.newest, t))*1e-9, r.baseT)
		r.stats.count(VerdictTooOld, false)
		r.stats.sensorVerdict(e.sensor, VerdictTooOld, 0, 0)
		return res
	case r.started && t <= r.newest:
		var ins insertion
		r.insert(e, &ins)
		r.decideMeas(&res, &ins, sensor)
		return res
	case r.started && nsAfter(t, r.newest) > uint64(r.cfg.MaxHoldAheadNs):
		r.stats.count(VerdictInvalid, false)
		return invalid(res, fmt.Errorf("%w: stamp_ns %d is %.3f s past the newest odometry (max_hold_ahead_ns %d)", ErrTooFarAhead, t, float64(nsAfter(t, r.newest))*1e-9, r.cfg.MaxHoldAheadNs))
	case len(r.held) >= r.cfg.MaxHeld:
		r.stats.count(VerdictInvalid, false)
		return invalid(res, fmt.Errorf("%w: %d held (max_held)", ErrHeldFull, len(r.held)))
	}
	r.hold(e)
	res.Verdict = VerdictHeld
	r.stats.count(VerdictHeld, false)
	return res
}

// repeatOf returns the sequence number of the measurement in the window or
// held that e repeats exactly (the same sensor, stamp, kind, mount, landmark,
// values and covariance), or 0. A camera that sends its last detection
// again, or a bus that delivers a message twice, repeats a reading so
// (common practice); two readings of one sensor at one stamp that agree
// in every bit are no two measurements. Taken twice, a reading's
// information counted twice and its covariance claimed it (a fix sent five
// times cut the position's standard deviation by sqrt(5)).
func (r *Robot) repeatOf(e *entry) uint64 {
	live := r.live()
	for i := r.locate(e.t1) - 1; i >= 0 && live[i].t1 == e.t1; i-- {
		if sameReading(&live[i], e) {
			return live[i].seq
		}
	}
	for i := range r.held {
		if sameReading(&r.held[i], e) {
			return r.held[i].seq
		}
	}
	return 0
}

// sameReading reports whether measurement entries a and b are one reading:
// the fields that the update leaves as they were given (it sets Hold and
// the landmark terms).
func sameReading(a, b *entry) bool {
	return a.kind == entMeas && b.kind == entMeas && a.t1 == b.t1 && a.imu == b.imu && a.sensor == b.sensor && a.lm == b.lm && a.marker == b.marker &&
		a.meas.Kind == b.meas.Kind && a.meas.Mount == b.meas.Mount && a.meas.Z == b.meas.Z && a.meas.R == b.meas.R
}

// hold keeps e in stamp order (arrival order among equal stamps).
func (r *Robot) hold(e *entry) {
	i := len(r.held)
	for i > 0 && r.held[i-1].t1 > e.t1 {
		i--
	}
	r.held = append(r.held, entry{})
	copy(r.held[i+1:], r.held[i:])
	r.held[i] = *e
}

// releaseHeld inserts held entries that odometry has now reached.
func (r *Robot) releaseHeld(res *Result) {
	for len(r.held) > 0 && r.held[0].t1 <= r.newest {
		e := r.held[0]
		n := copy(r.held, r.held[1:])
		r.held[n] = entry{}
		r.held = r.held[:n]
		sub := Result{Seq: e.seq}
		if e.t1 < r.baseT {
			sub.Verdict = VerdictTooOld
			sub.Err = fmt.Errorf("%w: stamp_ns %d precedes the first odometry or the last reseed at %d", ErrTooOld, e.t1, r.baseT)
			r.stats.count(VerdictTooOld, false)
		} else if e.kind == entReset {
			r.insertReset(&e, &sub)
		} else {
			var ins insertion
			r.insert(&e, &ins)
			r.decideMeas(&sub, &ins, r.stats.sensors[e.sensor].ID)
		}
		res.Resolved = append(res.Resolved, Resolution{Seq: sub.Seq, Verdict: sub.Verdict, NIS: sub.NIS, Err: sub.Err})
		res.Events = append(res.Events, sub.Events...)
	}
}
