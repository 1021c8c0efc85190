package fusion

import (
	"errors"
	"fmt"
	"math"

	"google.golang.org/protobuf/encoding/protowire"
	"reckon.example/estimator"
)

// SnapshotVersion is the layout version of Snapshot's bytes (message
// reckon.v1.RobotSnapshot). Version 3: the protocol buffer layout
// (versions 1 and 2 were gob of Go structs, which a field rename silently
// emptied). Version 5: estimates of up to estimator.MaxStates states
// (IMU offset, odometry calibration, sensor bias blocks), measurements with
// their bias states and robust weighting, recovery candidates carried by
// odometry (landmark fixes among them), reseeds that keep the IMU offset,
// the fix_disagrees trust state and the state of the IMU's slip comparison.
// Version 6: the run number and boot id (StartRun); RestoreSnapshot also
// reads version 5, a snapshot of a robot's first run. Version 7: a
// recovery candidate's carried odometry keeps its white part and its
// Jacobian in the calibration apart (relocate weighs shared odometry);
// version 6 and 5 candidates read as all white. Version 8: the block sum
// that the scrub in turns is charged on (scrub.go); a version 7, 6 or 5
// snapshot lacks it and starts a fresh block, so its robot's next steps may
// take a little less scrub than the robot that wrote it would have.
// Version 9: the turn scale's errors-in-variables moments in every
// estimate (estimator.State's EIV) and, in odometry entries, the scrub
// part of the step's turn variance and whether the step came from the
// wheels; a version 8 to 5 snapshot lacks them, and its robot starts the
// moments at zero and replays its window's steps without them.
// A change of layout or meaning bumps it, with a new golden file in
// testdata/snapshots.
// Version 10: landmark blocks (which landmark each stands for, in the
// robot and every checkpoint; a landmark fix's landmark and whether it
// seeded a block) and the measurements' mount and landmark error states; a
// version 9 to 5 snapshot has no landmark blocks, and its measurements
// lack their mount error states, which RestoreSnapshot takes from their
// sensors again (before, a replay of its window after a late fix took
// them without the sensor's mount block).
// Version 11: the counts of an odometry sample refused as an implausible
// jump, kept until the next sample says what they were (odometry.go); a
// version 10 to 5 snapshot has none (the builds that wrote them took a
// jump's counts as the reference at once).
// Version 12: the anchor of the IMU slip comparison's long interval
// (slip.go); a version 11 to 5 snapshot has none, and its robot starts
// the long comparison at its next IMU heading.
// Version 13: the IMU heading that raised imu_unchanged (imufrozen.go);
// a version 12 to 5 snapshot has none (its builds had no such reason).
// Version 14: each sensor record's robust weighting and parameter
// (SensorStats.Robust), by which Consistency judges a Student-t sensor; a
// version 13 to 5 snapshot lacks them, and its records take the robot's
// configuration's.
// Version 15: a pose fix's marker key in its entry and its recovery
// candidate, and whether the candidates wait for another marker
// (move_unconfirmed); a version 14 to 5 snapshot has none (its fixes named
// no marker).
// Version 16: a reseed held untrusted until a fix of another marker is
// applied, and its marker's key (recovery.go, holdReseed); a version 15 to
// 5 snapshot has none (its builds held no reseed).
// Version 17: in odometry entries, the IMU slip comparison's factor that a
// step's covariance carries (slip.go), which a reset takes back from the
// steps after it; a version 16 to 5 snapshot has none, and a reset inside
// its window leaves the steps after it as they were, as its builds did.
// Version 18: the errors-in-variables moments cover the IMU offset too
// (4x4: estimator.EIVDim); a version 17 to 9 snapshot's 3x3 moments take
// the pose block, and the offset's row and column start at zero.
// Version 19: the consider column of the turn scale's compensation
// (estimator.State's EIVConsider) in each estimate; a version 18 to 5
// snapshot has none, and its robot's compensation starts its own
// uncertainty at zero, as its builds carried none.
// Version 20: the IMU's last heading, its turn and the estimate's own
// turn since of a gyro scale (estimator.State's IMUGyro) in each estimate; a version 19 to 5
// snapshot has none, and its robots had no gyro scale
// (calibration.gyro_scale_std is new), so it restores as it was.
// Version 21: for sensors whose correlated error is per landmark
// (sensors[].correlated_per_landmark, new), the newest fix of each
// landmark folded out of the window (markTable) and a recovery
// candidate's sensor; a version 20 to 5 snapshot has neither, and its
// robots had no such sensors, so it restores as it was.
const SnapshotVersion = 21

// readsVersion tells whether RestoreSnapshot reads snapshots of version v:
// this one; 20, whose robots had no per-landmark correlated sensor; 19, whose robots had no gyro scale; 18, whose estimates lack the compensation's consider column; 17, whose moments lack the IMU offset; 16, which lacks the steps' slip factors; 15, which lacks the held reseed; 14 and 13, which lack the markers (13 also the sensor records' robust weighting); 12, which lacks the frozen IMU heading; 11, which lacks the slip comparison's long anchor; 10, which lacks the kept counts of a jump; 9, which lacks the landmark blocks and the measurements' mount
// error states; 8, which lacks the moments and the odometry entries' scrub;
// 7, which lacks the scrub's block sum; 6, whose recovery candidates lack the white part and the
// calibration Jacobian of their carried odometry (all of its covariance is
// taken as white); and 5, which lacks the run fields too (a robot that never
// started a second run).
func readsVersion(v uint64) bool { return v >= 5 && v <= SnapshotVersion }

// ErrSnapshot marks a snapshot that cannot be restored: damaged, of another
// version, or of a robot with another configuration.
var ErrSnapshot = errors.New("unusable snapshot")

// Snapshot returns the robot's complete state as bytes. RestoreSnapshot
// with the same configuration gives a robot that goes on exactly as this one
// would, bit for bit: the service writes snapshots into the journal so that
// a restart replays only what came after the last one.
func (r *Robot) Snapshot() ([]byte, error) {
	var e wenc
	e.uint(1, SnapshotVersion)
	st := r.f.State()
	e.message(2, func(e *wenc) { encState(e, &st) })
	e.bool(3, r.ready)
	e.bool(4, r.started)
	e.message(5, func(e *wenc) { encCheckpoint(e, &r.base) })
	e.int(6, r.baseT)
	e.int(7, r.newest)
	for i := range r.live() {
		e.message(8, func(e *wenc) { r.encEntry(e, &r.live()[i]) })
	}
	for i := range r.held {
		e.message(9, func(e *wenc) { r.encEntry(e, &r.held[i]) })
	}
	e.ints(10, r.lastCounts)
	if r.lastIMU != nil {
		e.double(11, *r.lastIMU)
	}
	e.uint(12, r.seq)
	e.message(13, func(e *wenc) { encCounts(e, &r.stats.odo) })
	e.message(14, func(e *wenc) { encCounts(e, &r.stats.meas) })
	for i := range r.stats.sensors {
		e.message(15, func(e *wenc) { encSensor(e, &r.stats.sensors[i]) })
	}
	e.uint(16, r.stats.slips)
	e.uint(17, r.stats.gaps)
	e.uint(18, r.stats.recoveries)
	e.uint(19, uint64(r.trust.reasons))
	e.int(20, int64(r.trust.refusedRun))
	e.bool(21, r.trust.fault)
	if r.trust.fixes.nis != nil {
		e.message(22, func(e *wenc) { encWindow(e, &r.trust.fixes) })
	}
	if r.trust.imu.nis != nil {
		e.message(23, func(e *wenc) { encWindow(e, &r.trust.imu) })
	}
	for i := range r.cands {
		e.message(24, func(e *wenc) { encCandidate(e, &r.cands[i]) })
	}
	e.bool(25, r.trust.disagree)
	if a := &r.slip.anchor; a.set {
		e.int(26, a.stamp)
		e.double(27, a.heading)
		e.double(28, a.varRad2)
	}
	e.double(29, r.slip.factor)
	e.double(30, r.slip.turnSum)
	e.double(31, r.slip.varSum)
	if r.trust.bias.score != nil {
		e.message(32, func(e *wenc) { encBias(e, &r.trust.bias) })
	}
	e.uint(33, r.run)
	e.string(34, r.bootID)
	e.int(35, r.scrub.block)
	e.double(36, r.scrub.sum)
	e.double(37, r.scrub.peak)
	if len(r.lmAt) > 0 {
		e.message(38, func(e *wenc) { encTable(e, &r.lm) })
	}
	e.ints(39, r.jumpCounts)
	if a := &r.slip.long; a.set {
		e.int(40, a.stamp)
		e.double(41, a.heading)
		e.double(42, a.varRad2)
	}
	if r.trust.frozen {
		e.double(43, r.trust.frozenZ)
	}
	if r.trust.unconfirmed {
		// Absent otherwise, as in snapshots before version 15.
		e.bool(44, true)
	}
	if r.trust.held {
		// Absent otherwise, as in snapshots before version 16; present
		// with key 0 for a reseed at a fix that named no marker.
		e.uint(45, uint64(r.trust.heldMarker))
	}
	if len(r.marks) > 0 {
		// Absent otherwise, as in snapshots before version 21.
		e.message(46, func(e *wenc) { encMarks(e, &r.marks) })
	}
	return e.b, nil
}

// RestoreSnapshot makes a robot from cfg and a snapshot that a robot of the
// same configuration took. Errors wrap ErrSnapshot.
func RestoreSnapshot(cfg Config, b []byte) (*Robot, error) {
	r, err := New(cfg)
	if err != nil {
		return nil, err
	}
	d := wdec{b: b, angles: r.layout.Angles(), gyroTurnMax: r.gyroTurnMax()}
	version := uint64(0)
	var filter estimator.State
	for num, ok := d.next(); ok; num, ok = d.next() {
		if num == 1 {
			version = d.uint(num)
			d.version = version
		} else if !readsVersion(version) {
			return nil, fmt.Errorf("%w: version %d, this build reads %d", ErrSnapshot, version, SnapshotVersion)
		}
		switch num {
		case 1:
		case 2:
			d.message(num, func(d *wdec) { filter = decState(d) })
		default:
			r.decodeField(&d, num)
		}
	}
	if d.err != nil {
		return nil, d.err
	}
	if !readsVersion(version) {
		return nil, fmt.Errorf("%w: version %d, this build reads %d", ErrSnapshot, version, SnapshotVersion)
	}
	if filter.Size() != r.n {
		return nil, fmt.Errorf("%w: snapshot of a %d-state robot for a %d-state configuration", ErrSnapshot, filter.Size(), r.n)
	}
	r.f.SetState(&filter)
	if err := r.checkRestored(); err != nil {
		return nil, err
	}
	if version < 10 {
		r.mountErrorsBack()
	}
	return r, nil
}

// mountErrorsBack gives the fixes of a snapshot before version 10, which
// did not record their measurements' mount error states, those of their
// sensor's mount block again, so that a replay of the window takes them as
// the robot that wrote it did. A fix carrying its own mount had none; one
// whose own mount equals its sensor's configured one takes the block too
// (the one case the old snapshot cannot tell apart).
func (r *Robot) mountErrorsBack() {
	for _, ents := range [][]entry{r.ents, r.held} {
		for i := range ents {
			e := &ents[i]
			if e.kind != entMeas || e.imu || e.sensor < 0 || e.sensor >= len(r.stats.sensors) {
				continue
			}
			si, ok := r.sensorIndex[r.stats.sensors[e.sensor].ID]
			if ok && r.sensorMount[si] > 0 && e.meas.Mount == r.cfg.Sensors[si].Mount {
				e.meas.MountError = r.sensorMount[si]
			}
		}
	}
}

// decodeField reads one top-level field of the snapshot into r.
func (r *Robot) decodeField(d *wdec, num protowire.Number) {
	switch num {
	case 3:
		r.ready = d.bool(num)
	case 4:
		r.started = d.bool(num)
	case 5:
		d.message(num, func(d *wdec) { r.base = decCheckpoint(d) })
	case 6:
		r.baseT = d.int(num)
	case 7:
		r.newest = d.int(num)
	case 8:
		d.message(num, func(d *wdec) { r.ents = append(r.ents, r.decEntry(d)) })
	case 9:
		d.message(num, func(d *wdec) { r.held = append(r.held, r.decEntry(d)) })
	case 10:
		r.lastCounts = d.intSlice(num)
	case 11:
		v := d.double(num)
		r.lastIMU = &v
	case 12:
		r.seq = d.uint(num)
	case 13:
		d.message(num, func(d *wdec) { r.stats.odo = decCounts(d) })
	case 14:
		d.message(num, func(d *wdec) { r.stats.meas = decCounts(d) })
	case 15:
		d.message(num, func(d *wdec) {
			s := decSensor(d)
			i := r.statsSensor(s.ID, s.GateProbability)
			if s.Robust == 0 {
				// Before version 14: the configuration's.
				s.Robust, s.RobustParameter = r.stats.sensors[i].Robust, r.stats.sensors[i].RobustParameter
			}
			r.stats.sensors[i] = s
		})
	case 16:
		r.stats.slips = d.uint(num)
	case 17:
		r.stats.gaps = d.uint(num)
	case 18:
		r.stats.recoveries = d.uint(num)
	case 19:
		r.trust.reasons = TrustReason(d.uint(num))
	case 20:
		r.trust.refusedRun = int(d.int(num))
	case 21:
		r.trust.fault = d.bool(num)
	case 22:
		d.message(num, func(d *wdec) { decWindow(d, &r.trust.fixes) })
	case 23:
		d.message(num, func(d *wdec) { decWindow(d, &r.trust.imu) })
	case 24:
		d.message(num, func(d *wdec) { r.cands = append(r.cands, decCandidate(d)) })
	case 25:
		r.trust.disagree = d.bool(num)
	case 26:
		r.slip.anchor.set, r.slip.anchor.stamp = true, d.int(num)
	case 27:
		r.slip.anchor.heading = d.double(num)
	case 28:
		r.slip.anchor.varRad2 = d.double(num)
	case 29:
		r.slip.factor = d.double(num)
	case 30:
		r.slip.turnSum = d.double(num)
	case 31:
		r.slip.varSum = d.double(num)
	case 32:
		d.message(num, func(d *wdec) { decBias(d, &r.trust.bias) })
	case 33:
		r.run = d.uint(num)
	case 34:
		r.bootID = d.string(num)
	case 35:
		r.scrub.block = d.int(num)
	case 36:
		r.scrub.sum = d.double(num)
	case 37:
		r.scrub.peak = d.double(num)
	case 38:
		d.message(num, func(d *wdec) { decTable(d, &r.lm) })
	case 39:
		r.jumpCounts = d.intSlice(num)
	case 40:
		r.slip.long.set, r.slip.long.stamp = true, d.int(num)
	case 41:
		r.slip.long.heading = d.double(num)
	case 42:
		r.slip.long.varRad2 = d.double(num)
	case 43:
		r.trust.frozen, r.trust.frozenZ = true, d.double(num)
	case 44:
		r.trust.unconfirmed = d.bool(num)
	case 45:
		r.trust.held, r.trust.heldMarker = true, d.uint32(num)
	case 46:
		d.message(num, func(d *wdec) { decMarks(d, &r.marks) })
	default:
		d.fail("unknown field %d", num)
	}
}

// gyroTurnMax is the largest IMU turn an estimate of r's gyro scale holds
// (estimator.State's IMUGyro): the turn is summed until it reaches the
// step's threshold, GyroStepSigmas sqrt(2 R), for the next heading's
// variance R, at most maxAngleVar with the counts' quantisation
// (imuMeasurement), and gains one wrapped turn after it, at most pi. 0
// without a gyro scale, whose turn stays 0.
func (r *Robot) gyroTurnMax() float64 {
	if r.layout.GyroScale() < 0 {
		return 0
	}
	return estimator.GyroStepSigmas*math.Sqrt(2*(maxAngleVar+r.quantTurnVar)) + math.Pi
}

// checkRestored checks what the rest of the robot relies on: every state
// of the filter's size, sensor indices in range, counts for every wheel.
func (r *Robot) checkRestored() error {
	if r.restoreErr != nil {
		return r.restoreErr
	}
	states := []*estimator.State{&r.base.est}
	for k, q := range [][]entry{r.ents, r.held} {
		for i := range q {
			if k == 0 && q[i].after.Slot == 0 {
				// A held entry has no checkpoint until odometry reaches it.
				return fmt.Errorf("%w: a checkpoint of 0 states for a %d-state robot", ErrSnapshot, r.n)
			}
			if q[i].kind < entOdo || q[i].kind > entReset {
				return fmt.Errorf("%w: entry of kind %d", ErrSnapshot, q[i].kind)
			}
			if q[i].kind == entMeas && (q[i].sensor < 0 || q[i].sensor >= len(r.stats.sensors)) {
				return fmt.Errorf("%w: entry of sensor %d of %d", ErrSnapshot, q[i].sensor, len(r.stats.sensors))
			}
			if err := r.checkStates(&q[i]); err != nil {
				return err
			}
			if q[i].after.Slot != 0 {
				var cp checkpoint
				r.loadInto(&cp, &q[i].after)
				if err := r.checkTable(&cp.lm); err != nil {
					return err
				}
			}
		}
	}
	for _, t := range []*lmTable{&r.lm, &r.base.lm} {
		if err := r.checkTable(t); err != nil {
			return err
		}
	}
	if err := r.checkMarks(); err != nil {
		return err
	}
	for _, s := range states {
		if s.Size() != r.n {
			return fmt.Errorf("%w: a checkpoint of %d states for a %d-state robot", ErrSnapshot, s.Size(), r.n)
		}
	}
	if err := r.checkValues(); err != nil {
		return err
	}
	if r.lastCounts != nil && len(r.lastCounts) != len(r.cfg.Wheels) {
		return fmt.Errorf("%w: %d counts for %d wheels", ErrSnapshot, len(r.lastCounts), len(r.cfg.Wheels))
	}
	if r.jumpCounts != nil && (len(r.jumpCounts) != len(r.cfg.Wheels) || r.lastCounts == nil) {
		return fmt.Errorf("%w: %d counts of a jump for %d wheels", ErrSnapshot, len(r.jumpCounts), len(r.cfg.Wheels))
	}
	if b := &r.trust.bias; len(b.score) != len(b.info) || len(b.score) > 0 && (b.pos < 0 || b.pos >= len(b.score) || b.fill < 0 || b.fill > len(b.score)) {
		return fmt.Errorf("%w: bias window of %d scores, %d informations, at %d, %d filled", ErrSnapshot, len(b.score), len(b.info), b.pos, b.fill)
	}
	for _, w := range []*nisWindow{&r.trust.fixes, &r.trust.imu} {
		if len(w.nis) != len(w.dims) || len(w.nis) > 0 && (w.pos < 0 || w.pos >= len(w.nis) || w.fill < 0 || w.fill > len(w.nis)) {
			return fmt.Errorf("%w: trust window of %d values, %d dimensions, at %d, %d filled", ErrSnapshot, len(w.nis), len(w.dims), w.pos, w.fill)
		}
	}
	return nil
}

// checkValues checks the numbers a replay of the window computes with:
// the estimate now, at the window's start and after each entry (means
// finite; covariances finite, with variances not negative and no
// correlation past 1), and each entry's step, fix or reset (finite, their
// covariances likewise). The CRC of a journal record guards only against
// damage in it: a snapshot that a faulty build wrote, or one forged, with
// a NaN or a negative variance in it would otherwise restore into a robot
// that serves that nonsense, or fails every sample as a numerical fault,
// where refusing it replays the journal's inputs from the start instead
// (server, restore.go).
func (r *Robot) checkValues() error {
	cur := r.f.State()
	if what := stateFault(&cur); what != "" {
		return fmt.Errorf("%w: the estimate %s", ErrSnapshot, what)
	}
	if what := r.robotFault(); what != "" {
		return fmt.Errorf("%w: %s", ErrSnapshot, what)
	}
	if r.base.est.Size() != 0 {
		if what := stateFault(&r.base.est); what != "" {
			return fmt.Errorf("%w: the window's starting estimate %s", ErrSnapshot, what)
		}
	}
	var st estimator.State
	for k, q := range [][]entry{r.ents, r.held} {
		name := [2]string{"window", "held"}[k]
		for i := range q {
			e := &q[i]
			if what := entryFault(e); what != "" {
				return fmt.Errorf("%w: %s entry %d (stamp_ns %d): %s", ErrSnapshot, name, i, e.t1, what)
			}
			if e.after.Slot == 0 {
				continue
			}
			r.loadEst(&st, &e.after)
			if what := stateFault(&st); what != "" {
				return fmt.Errorf("%w: %s entry %d (stamp_ns %d): the estimate after it %s", ErrSnapshot, name, i, e.t1, what)
			}
		}
	}
	return nil
}

// robotFault says what is wrong with the numbers the robot computes new
// steps with ("" if nothing): the IMU slip comparison's (its factor 0 or
// at least 1 and finite, its sums finite, its variances not negative, its
// anchors' headings finite), the scrub block's turn sums, the last IMU
// heading and the one that raised imu_unchanged. A slip factor of +Inf
// multiplies every new step's covariance into infinities: the restored
// robot answered each sample with a NaN covariance and numerical_fault.
func (r *Robot) robotFault() string {
	finite := func(v float64) bool { return !math.IsNaN(v) && !math.IsInf(v, 0) }
	sl := &r.slip
	switch {
	case !finite(sl.factor) || sl.factor != 0 && sl.factor < 1:
		return fmt.Sprintf("slip factor %v is neither 0 nor a finite number of at least 1", sl.factor)
	case !finite(sl.turnSum) || !finite(sl.varSum) || sl.varSum < 0:
		return fmt.Sprintf("slip sums %v rad and %v rad^2 are not a finite sum and variance", sl.turnSum, sl.varSum)
	}
	for _, a := range []*turnAnchor{&sl.anchor, &sl.long} {
		if a.set && (!finite(a.heading) || !finite(a.varRad2) || a.varRad2 < 0) {
			return fmt.Sprintf("slip comparison anchor heading %v rad with variance %v is not finite or not a variance", a.heading, a.varRad2)
		}
	}
	if !finite(r.scrub.sum) || !finite(r.scrub.peak) || r.scrub.peak < 0 {
		return fmt.Sprintf("scrub block sum %v rad and peak %v rad are not finite, or the peak negative", r.scrub.sum, r.scrub.peak)
	}
	if r.lastIMU != nil && !finite(*r.lastIMU) {
		return fmt.Sprintf("last IMU heading %v is not finite", *r.lastIMU)
	}
	if r.trust.frozen && !finite(r.trust.frozenZ) {
		return fmt.Sprintf("unchanged IMU heading %v is not finite", r.trust.frozenZ)
	}
	return ""
}

// stateFault says what is wrong with an estimate's numbers ("" if
// nothing): a mean, covariance or errors-in-variables moment not finite,
// a variance below 0, a correlation past 1 (with a relative slack of 1e-6
// for rounding: a covariance matrix's off-diagonal values are bounded by
// the geometric mean of their variances, a property of every positive
// semidefinite matrix: each 2x2 principal minor is not negative, Horn and
// Johnson, Matrix Analysis, 1985, sec. 7.1, from memory).
func stateFault(s *estimator.State) string {
	n := s.Size()
	for i := 0; i < n; i++ {
		if v := s.MeanAt(i); math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Sprintf("has mean %v in state %d", v, i)
		}
	}
	// The turn scale's moments: every update that moves the scale
	// subtracts their pull from its mean, which one not finite would make
	// not finite.
	m := s.EIV()
	for k, v := range m {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Sprintf("has errors-in-variables moment %v at (%d, %d)", v, k/estimator.EIVDim, k%estimator.EIVDim)
		}
	}
	// Their consider column, which every update that takes a pull out
	// adds to the covariance.
	c := s.EIVConsider()
	for i, v := range c[:n] {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return fmt.Sprintf("has errors-in-variables consider value %v in state %d", v, i)
		}
	}
	return covFault(n, s.At)
}

// covFault is stateFault's check of an n x n covariance whose (i, j)
// value at gives.
func covFault(n int, at func(i, j int) float64) string {
	for i := 0; i < n; i++ {
		for j := 0; j < n; j++ {
			v := at(i, j)
			switch {
			case math.IsNaN(v) || math.IsInf(v, 0):
				return fmt.Sprintf("has covariance %v at (%d, %d)", v, i, j)
			case i == j && v < 0:
				return fmt.Sprintf("has variance %v in state %d", v, i)
			}
		}
	}
	for i := 0; i < n; i++ {
		for j := 0; j < i; j++ {
			if lim := math.Sqrt(at(i, i) * at(j, j)); math.Abs(at(i, j)) > lim*(1+1e-6) || math.Abs(at(j, i)) > lim*(1+1e-6) {
				return fmt.Sprintf("has covariance %v at (%d, %d), past the %v its variances allow", at(i, j), i, j, lim)
			}
		}
	}
	return ""
}

// entryFault says what is wrong with the numbers of an entry's input (""
// if nothing).
func entryFault(e *entry) string {
	finite := func(v ...float64) bool {
		for _, x := range v {
			if math.IsNaN(x) || math.IsInf(x, 0) {
				return false
			}
		}
		return true
	}
	cov3 := func(c *[9]float64) string { return covFault(3, func(i, j int) float64 { return c[3*i+j] }) }
	switch e.kind {
	case entOdo:
		if s := e.step; !finite(s.ForwardM, s.LeftM, s.TurnRad) {
			return fmt.Sprintf("step %+v is not finite", s)
		}
		if !(e.scrub >= 0) || math.IsInf(e.scrub, 1) {
			return fmt.Sprintf("scrub variance %v is not a variance", e.scrub)
		}
		if what := cov3(&e.cov); what != "" {
			return "step " + what
		}
	case entMeas:
		m := &e.meas
		if !finite(m.Z[:]...) || !finite(m.Mount.X, m.Mount.Y, m.Mount.Heading, m.LandmarkX, m.LandmarkY) {
			return fmt.Sprintf("fix %v at mount %+v, landmark (%v, %v), is not finite", m.Z, m.Mount, m.LandmarkX, m.LandmarkY)
		}
		if what := cov3(&m.R); what != "" {
			return "fix " + what
		}
	case entReset:
		if p := e.pose; !finite(p.X, p.Y, p.Heading) {
			return fmt.Sprintf("reset pose %+v is not finite", p)
		}
		if what := cov3(&e.poseCov); what != "" {
			return "reset pose " + what
		}
	}
	return ""
}

// checkStates checks that the states an entry's measurement names lie in
// the robot's state, and its landmark in the configuration: a damaged
// snapshot must not make the estimator panic at the next replay.
func (r *Robot) checkStates(e *entry) error {
	m := &e.meas
	bad := func(at, dim int) bool { return at != 0 && (at < 3 || at+dim > r.n) }
	for _, b := range m.Bias {
		if bad(b, 1) {
			return fmt.Errorf("%w: a measurement's bias state %d of %d", ErrSnapshot, b, r.n)
		}
	}
	if bad(m.MountError, 3) || bad(m.LandmarkError, 2) {
		return fmt.Errorf("%w: a measurement's mount states at %d or landmark states at %d of %d", ErrSnapshot, m.MountError, m.LandmarkError, r.n)
	}
	if e.lm < 0 || int(e.lm) > len(r.cfg.Landmarks) || !(m.LandmarkVar >= 0 && m.LandmarkVar <= maxLandmarkStdM*maxLandmarkStdM) {
		return fmt.Errorf("%w: a fix of landmark %d of %d, survey variance %v", ErrSnapshot, e.lm, len(r.cfg.Landmarks), m.LandmarkVar)
	}
	return nil
}

// checkTable checks that a landmark block table names configured
// landmarks.
func (r *Robot) checkTable(t *lmTable) error {
	for i := range t {
		if t[i].id < 0 || int(t[i].id) > len(r.cfg.Landmarks) || i >= len(r.lmAt) && t[i].id != 0 {
			return fmt.Errorf("%w: landmark block %d of %d stands for landmark %d of %d", ErrSnapshot, i, len(r.lmAt), t[i].id, len(r.cfg.Landmarks))
		}
	}
	return nil
}

func encState(e *wenc, s *estimator.State) {
	n := s.Size()
	var x [estimator.MaxStates]float64
	var p [estimator.MaxStates * estimator.MaxStates]float64
	s.MeanInto(x[:])
	s.CovarianceInto(p[:])
	e.uint(1, uint64(n))
	e.doubles(2, x[:n])
	e.doubles(3, p[:n*n])
	if m := s.EIV(); m != (estimator.EIVMoments{}) {
		e.doubles(4, m[:])
	}
	if c := s.EIVConsider(); c != ([estimator.MaxStates]float64{}) {
		e.doubles(5, c[:n])
	}
	if z, u, w := s.IMUGyro(); z != 0 || u != 0 || w != 0 {
		e.doubles(6, []float64{z, u, w})
	}
}

func decState(d *wdec) estimator.State {
	var n uint64
	var x, p []float64
	var m estimator.EIVMoments
	var c []float64
	var gyro []float64
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			n = d.uint(num)
		case 2:
			x = d.doubleSlice(num)
		case 3:
			p = d.doubleSlice(num)
		case 4:
			m = decEIV(d, num)
		case 5:
			c = d.doubleSlice(num)
			if d.version < 19 {
				d.fail("estimate: errors-in-variables consider column in a version %d snapshot (from version 19)", d.version)
			}
		case 6:
			gyro = d.doubleSlice(num)
			if d.version < 20 {
				d.fail("estimate: IMU heading and turn of a gyro scale in a version %d snapshot (from version 20)", d.version)
			}
			// The heading is wrapped; the turn is a sum of wrapped
			// turns, below the step's threshold before the last
			// (Robot.gyroTurnMax): a larger one would move the offset
			// by the gyro scale times it at the next IMU heading. The
			// estimate's own turn since the heading (third) unwraps the
			// IMU's next turn: an angle within maxAngleRad, as every
			// heading.
			if len(gyro) != 3 || math.IsNaN(gyro[0]) || math.Abs(gyro[0]) > math.Pi || !(math.Abs(gyro[1]) <= d.gyroTurnMax) || !(math.Abs(gyro[2]) <= maxAngleRad) {
				d.fail("estimate: IMU heading, turn and the estimate's turn since of a gyro scale %v are not a wrapped angle, a turn within %g rad and one within %g rad", gyro, d.gyroTurnMax, maxAngleRad)
				gyro = nil
			}
		default:
			d.fail("estimate: unknown field %d", num)
		}
	}
	if d.err != nil || n == 0 && len(x) == 0 && len(p) == 0 {
		// A held entry has no checkpoint yet: its estimate is the zero State.
		return estimator.State{}
	}
	if n < 3 || n > estimator.MaxStates || len(x) != int(n) || len(p) != int(n*n) {
		d.fail("estimate of size %d with %d mean and %d covariance values", n, len(x), len(p))
		return estimator.State{}
	}
	if c != nil && len(c) != int(n) {
		d.fail("estimate of size %d with %d errors-in-variables consider values", n, len(c))
		return estimator.State{}
	}
	st := estimator.NewState(int(n), d.angles, x, p)
	st.SetEIV(m)
	var col [estimator.MaxStates]float64
	copy(col[:], c)
	st.SetEIVConsider(col)
	if gyro != nil {
		st.SetIMUGyro(gyro[0], gyro[1], gyro[2])
	}
	return st
}

// decEIV reads an estimate's errors-in-variables moments: 16 values
// (version 18, the pose and the IMU offset), or the 9 of the pose alone
// (versions 9 to 17), which take the pose block and leave the offset's
// row and column zero. Another count than the version's is a damaged or
// mislabelled snapshot: read as the other version's, the moments would
// land in the wrong places.
func decEIV(d *wdec, num protowire.Number) estimator.EIVMoments {
	var m estimator.EIVMoments
	v := d.doubleSlice(num)
	want := len(m)
	if d.version < 18 {
		want = 9
	}
	switch {
	case len(v) != want:
		d.fail("estimate: %d errors-in-variables moments in a version %d snapshot, want %d", len(v), d.version, want)
	case want == 9:
		for a := 0; a < 3; a++ {
			copy(m[a*estimator.EIVDim:a*estimator.EIVDim+3], v[a*3:a*3+3])
		}
	default:
		copy(m[:], v)
	}
	return m
}

func encCheckpoint(e *wenc, c *checkpoint) {
	e.message(1, func(e *wenc) { encState(e, &c.est) })
	e.bool(2, c.offsetReady)
	if c.lm != (lmTable{}) {
		e.message(3, func(e *wenc) { encTable(e, &c.lm) })
	}
}

func encTable(e *wenc, t *lmTable) {
	ids := make([]int64, len(t))
	last := make([]int64, len(t))
	for i := range t {
		ids[i], last[i] = int64(t[i].id), t[i].last
	}
	e.ints(1, ids)
	e.ints(2, last)
}

func decTable(d *wdec, t *lmTable) {
	for num, ok := d.next(); ok; num, ok = d.next() {
		v := d.intSlice(num)
		if len(v) != len(t) || num != 1 && num != 2 {
			d.fail("landmark blocks: field %d of %d values", num, len(v))
			return
		}
		for i := range t {
			if num == 1 {
				if v[i] < 0 || v[i] > math.MaxInt32 {
					d.fail("landmark blocks: landmark %d", v[i])
					return
				}
				t[i].id = int32(v[i])
			} else {
				t[i].last = v[i]
			}
		}
	}
}

func decCheckpoint(d *wdec) checkpoint {
	var c checkpoint
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			d.message(num, func(d *wdec) { c.est = decState(d) })
		case 2:
			c.offsetReady = d.bool(num)
		case 3:
			d.message(num, func(d *wdec) { decTable(d, &c.lm) })
		default:
			d.fail("checkpoint: unknown field %d", num)
		}
	}
	return c
}

func (r *Robot) encEntry(e *wenc, en *entry) {
	e.uint(1, uint64(en.kind))
	e.int(2, en.t0)
	e.int(3, en.t1)
	e.uint(4, en.seq)
	e.doubles(5, []float64{en.step.ForwardM, en.step.LeftM, en.step.TurnRad})
	e.doubles(6, en.cov[:])
	e.message(7, func(e *wenc) { encMeasurement(e, &en.meas) })
	e.bool(8, en.imu)
	e.int(9, int64(en.sensor))
	e.pose(10, en.pose)
	e.doubles(11, en.poseCov[:])
	after := r.checkpointOf(&en.after)
	e.message(12, func(e *wenc) { encCheckpoint(e, &after) })
	e.double(13, en.out.NIS)
	e.int(14, int64(en.out.Dim))
	e.bool(15, en.out.Gated)
	e.bool(16, en.initialised)
	e.bool(17, en.keepOffset)
	if en.wheels {
		// Absent for other entries, as in snapshots before version 9.
		e.double(18, en.scrub)
		e.bool(19, true)
	}
	if en.lm != 0 {
		e.int(20, int64(en.lm))
		e.bool(21, en.seeded)
	}
	if en.marker != 0 {
		e.uint(22, uint64(en.marker))
	}
	if en.slipK != 0 {
		e.double(23, en.slipK)
	}
}

// decEntry reads an entry and stores its checkpoint in a slot of r's.
func (r *Robot) decEntry(d *wdec) entry {
	var en entry
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			en.kind = entryKind(d.uint(num))
		case 2:
			en.t0 = d.int(num)
		case 3:
			en.t1 = d.int(num)
		case 4:
			en.seq = d.uint(num)
		case 5:
			en.step = d.step(num)
		case 6:
			d.doubles(num, en.cov[:])
		case 7:
			d.message(num, func(d *wdec) { en.meas = decMeasurement(d) })
		case 8:
			en.imu = d.bool(num)
		case 9:
			en.sensor = int(int32(d.int(num)))
		case 10:
			en.pose = d.pose(num)
		case 11:
			d.doubles(num, en.poseCov[:])
		case 12:
			d.message(num, func(d *wdec) {
				cp := decCheckpoint(d)
				if n := cp.est.Size(); n != 0 && n != r.n {
					r.restoreErr = fmt.Errorf("%w: a checkpoint of %d states for a %d-state robot", ErrSnapshot, n, r.n)
					return
				}
				r.setCheckpoint(&en.after, &cp)
			})
		case 13:
			en.out.NIS = d.double(num)
		case 14:
			en.out.Dim = int(int32(d.int(num)))
		case 15:
			en.out.Gated = d.bool(num)
		case 16:
			en.initialised = d.bool(num)
		case 17:
			en.keepOffset = d.bool(num)
		case 18:
			en.scrub = d.double(num)
		case 19:
			en.wheels = d.bool(num)
		case 20:
			en.lm = int32(d.int(num))
		case 21:
			en.seeded = d.bool(num)
		case 22:
			en.marker = d.uint32(num)
		case 23:
			// Written only when set: a slip's factor is positive and
			// finite; anything else would scale the step's covariance
			// into nonsense when a reset gives it back (restartSlip).
			if en.slipK = d.double(num); !(en.slipK > 0) || math.IsInf(en.slipK, 1) {
				d.fail("entry: slip factor %v is not a positive finite number", en.slipK)
			}
		default:
			d.fail("entry: unknown field %d", num)
		}
	}
	return en
}

func encMeasurement(e *wenc, m *estimator.Measurement) {
	e.uint(1, uint64(m.Kind))
	e.pose(2, m.Mount)
	e.double(3, m.LandmarkX)
	e.double(4, m.LandmarkY)
	e.doubles(5, m.Z[:])
	e.doubles(6, m.R[:])
	if m.Bias != [3]int{} {
		e.ints(7, []int64{int64(m.Bias[0]), int64(m.Bias[1]), int64(m.Bias[2])})
	}
	e.uint(8, uint64(m.Robust.Kind))
	e.double(9, m.Robust.Param)
	if m.MountError != 0 {
		e.int(10, int64(m.MountError))
	}
	if m.LandmarkError != 0 {
		e.int(11, int64(m.LandmarkError))
	}
	if m.LandmarkVar != 0 {
		e.double(12, m.LandmarkVar)
	}
}

func decMeasurement(d *wdec) estimator.Measurement {
	var m estimator.Measurement
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			m.Kind = estimator.Kind(d.uint(num))
		case 2:
			m.Mount = d.pose(num)
		case 3:
			m.LandmarkX = d.double(num)
		case 4:
			m.LandmarkY = d.double(num)
		case 5:
			d.doubles(num, m.Z[:])
		case 6:
			d.doubles(num, m.R[:])
		case 7:
			b := d.intSlice(num)
			if len(b) != 3 {
				d.fail("measurement: %d bias indices", len(b))
				break
			}
			for i, v := range b {
				m.Bias[i] = int(v)
			}
		case 8:
			m.Robust.Kind = estimator.RobustKind(d.uint(num))
		case 9:
			m.Robust.Param = d.double(num)
		case 10:
			m.MountError = int(int32(d.int(num)))
		case 11:
			m.LandmarkError = int(int32(d.int(num)))
		case 12:
			m.LandmarkVar = d.double(num)
		default:
			d.fail("measurement: unknown field %d", num)
		}
	}
	return m
}

func encCounts(e *wenc, c *VerdictCounts) {
	e.uint(1, c.Applied)
	e.uint(2, c.Held)
	e.uint(3, c.Gated)
	e.uint(4, c.TooOld)
	e.uint(5, c.Invalid)
}

func decCounts(d *wdec) VerdictCounts {
	var c VerdictCounts
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			c.Applied = d.uint(num)
		case 2:
			c.Held = d.uint(num)
		case 3:
			c.Gated = d.uint(num)
		case 4:
			c.TooOld = d.uint(num)
		case 5:
			c.Invalid = d.uint(num)
		default:
			d.fail("verdict counts: unknown field %d", num)
		}
	}
	return c
}

func encSensor(e *wenc, s *SensorStats) {
	e.string(1, s.ID)
	e.message(2, func(e *wenc) { encCounts(e, &s.VerdictCounts) })
	e.double(3, s.NISSum)
	e.int(4, int64(s.DOFSum))
	e.double(5, s.GateProbability)
	e.uint(6, uint64(s.Robust))
	e.double(7, s.RobustParameter)
}

func decSensor(d *wdec) SensorStats {
	var s SensorStats
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			s.ID = d.string(num)
		case 2:
			d.message(num, func(d *wdec) { s.VerdictCounts = decCounts(d) })
		case 3:
			s.NISSum = d.double(num)
		case 4:
			s.DOFSum = int(d.int(num))
		case 5:
			s.GateProbability = d.double(num)
		case 6:
			s.Robust = RobustLoss(d.uint(num))
		case 7:
			s.RobustParameter = d.double(num)
		default:
			d.fail("sensor: unknown field %d", num)
		}
	}
	return s
}

func encWindow(e *wenc, w *nisWindow) {
	dims := make([]int64, len(w.dims))
	for i, v := range w.dims {
		dims[i] = int64(v)
	}
	e.doubles(1, w.nis)
	e.ints(2, dims)
	e.int(3, int64(w.pos))
	e.int(4, int64(w.fill))
	e.bool(5, w.raised)
}

func decWindow(d *wdec, w *nisWindow) {
	var dims []int64
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			w.nis = d.doubleSlice(num)
		case 2:
			dims = d.intSlice(num)
		case 3:
			w.pos = int(d.int(num))
		case 4:
			w.fill = int(d.int(num))
		case 5:
			w.raised = d.bool(num)
		default:
			d.fail("trust window: unknown field %d", num)
		}
	}
	w.dims = make([]int, len(dims))
	w.dof = 0
	for i, v := range dims {
		w.dims[i] = int(v)
		w.dof += int(v)
	}
	if len(w.nis) == 0 {
		w.nis, w.dims = nil, nil
	}
}

func encCandidate(e *wenc, c *candidate) {
	e.int(1, c.stamp)
	e.pose(2, c.implied)
	e.doubles(4, c.cov[:])
	e.int(5, c.fixStamp)
	if c.isLandmark() {
		e.message(6, func(e *wenc) { encMeasurement(e, &c.meas) })
	}
	e.pose(7, c.rel)
	e.doubles(8, c.relCov[:])
	e.bool(9, c.keepOffset)
	if c.relW != c.relCov || c.relD != [9]float64{} {
		// Absent means all white (decCandidate), as in version 6.
		e.doubles(10, c.relW[:])
		e.doubles(11, c.relD[:])
	}
	if c.marker != 0 {
		e.uint(12, uint64(c.marker))
	}
	if c.corrSensor != 0 {
		e.uint(13, uint64(c.corrSensor))
	}
}

func decCandidate(d *wdec) candidate {
	var c candidate
	white := false
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			c.stamp = d.int(num)
		case 2:
			c.implied = d.pose(num)
		case 4:
			d.doubles(num, c.cov[:])
		case 5:
			c.fixStamp = d.int(num)
		case 6:
			d.message(num, func(d *wdec) { c.meas = decMeasurement(d) })
		case 7:
			c.rel = d.pose(num)
		case 8:
			d.doubles(num, c.relCov[:])
		case 9:
			c.keepOffset = d.bool(num)
		case 10:
			d.doubles(num, c.relW[:])
			white = true
		case 11:
			d.doubles(num, c.relD[:])
		case 12:
			c.marker = d.uint32(num)
		case 13:
			c.corrSensor = int32(d.uint32(num))
		default:
			d.fail("candidate: unknown field %d", num)
		}
	}
	if !white {
		// A snapshot from before the parts were kept: all of it white.
		c.relW = c.relCov
	}
	return c
}

func encBias(e *wenc, w *biasWindow) {
	score := make([]float64, 0, 3*len(w.score))
	info := make([]float64, 0, 9*len(w.info))
	for i := range w.score {
		score = append(score, w.score[i][:]...)
		info = append(info, w.info[i][:]...)
	}
	e.doubles(1, score)
	e.doubles(2, info)
	e.int(3, int64(w.pos))
	e.int(4, int64(w.fill))
	e.bool(5, w.raised)
	e.bool(6, w.changed)
}

func decBias(d *wdec, w *biasWindow) {
	var score, info []float64
	for num, ok := d.next(); ok; num, ok = d.next() {
		switch num {
		case 1:
			score = d.doubleSlice(num)
		case 2:
			info = d.doubleSlice(num)
		case 3:
			w.pos = int(d.int(num))
		case 4:
			w.fill = int(d.int(num))
		case 5:
			w.raised = d.bool(num)
		case 6:
			w.changed = d.bool(num)
		default:
			d.fail("bias window: unknown field %d", num)
		}
	}
	if len(score)%3 != 0 || len(info) != 3*len(score) {
		d.fail("bias window of %d score and %d information values", len(score), len(info))
		return
	}
	w.score, w.info = make([][3]float64, len(score)/3), make([][9]float64, len(score)/3)
	for i := range w.score {
		copy(w.score[i][:], score[3*i:])
		copy(w.info[i][:], info[9*i:])
	}
	if len(w.score) == 0 {
		w.score, w.info = nil, nil
	}
}

func encMarks(e *wenc, m *markTable) {
	lm, sensor, stamp := make([]int64, len(*m)), make([]int64, len(*m)), make([]int64, len(*m))
	for i, x := range *m {
		lm[i], sensor[i], stamp[i] = int64(x.lm), int64(x.sensor), x.last
	}
	e.ints(1, lm)
	e.ints(2, sensor)
	e.ints(3, stamp)
}

// decMarks reads a markTable: three equally long lists, landmarks,
// sensors and stamps. Entries of landmark 0 are the empty slots of the
// first version 21 snapshots, whose table had 8.
func decMarks(d *wdec, m *markTable) {
	var f [3][]int64
	for num, ok := d.next(); ok; num, ok = d.next() {
		if num < 1 || num > 3 || f[num-1] != nil {
			d.fail("landmark fixes: field %d", num)
			return
		}
		f[num-1] = d.intSlice(num)
	}
	if len(f[0]) != len(f[1]) || len(f[0]) != len(f[2]) {
		d.fail("landmark fixes: %d landmarks, %d sensors and %d stamps", len(f[0]), len(f[1]), len(f[2]))
		return
	}
	*m = (*m)[:0]
	for i := range f[0] {
		if f[0][i] < 0 || f[0][i] > math.MaxInt32 || f[1][i] < 0 || f[1][i] > math.MaxInt32 {
			d.fail("landmark fixes: landmark %d, sensor %d", f[0][i], f[1][i])
			return
		}
		if f[0][i] != 0 {
			*m = append(*m, markEntry{lm: int32(f[0][i]), sensor: int32(f[1][i]), last: f[2][i]})
		}
	}
}

// checkMarks checks the landmarks and sensors that markTable and the
// recovery candidates name for per-landmark correlated errors, and sets
// the candidates' correlated covariance from the configuration.
func (r *Robot) checkMarks() error {
	perLandmark := func(si int) bool { return si >= 0 && si < len(r.cfg.Sensors) && r.cfg.Sensors[si].perLandmark() }
	for i := range r.marks {
		m := &r.marks[i]
		if m.lm <= 0 || int(m.lm) > len(r.cfg.Landmarks) || !perLandmark(int(m.sensor)) {
			return fmt.Errorf("%w: a landmark fix of landmark %d of %d by sensor %d, which is not one with per-landmark correlated errors", ErrSnapshot, m.lm, len(r.cfg.Landmarks), m.sensor)
		}
		if _, twice := r.marks[:i].lookup(m.sensor, m.lm); twice {
			return fmt.Errorf("%w: two last fixes of landmark %d by sensor %d", ErrSnapshot, m.lm, m.sensor)
		}
	}
	for i := range r.cands {
		c := &r.cands[i]
		if c.corrSensor == 0 {
			continue
		}
		if !c.isLandmark() || !perLandmark(int(c.corrSensor)-1) {
			return fmt.Errorf("%w: a recovery candidate of sensor %d, which is not a landmark sensor with per-landmark correlated errors", ErrSnapshot, c.corrSensor-1)
		}
		c.setCorr(&r.cfg, int(c.corrSensor)-1)
	}
	return nil
}
