package fusion

import (
	"fmt"
	"math"
	"slices"
	"time"

	"reckon.example/estimator"
)

// weightFloor keeps weighted least-squares weights finite for rows whose
// variance is zero because their wheel did not move: (1 micrometre)^2.
const weightFloor = 1e-12

// odoResult is an odometry sample turned into a history entry.
type odoResult struct {
	e        entry
	has      bool // false for a reference sample that carries no motion
	imu      *float64
	gapNs    int64
	slipChi2 float64
	slipDOF  int
	// scrub is the scrub's block state after e, taken when e is.
	scrub scrubState
}

func finiteAll(v ...float64) bool {
	for _, x := range v {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return false
		}
	}
	return true
}

// maxAngleRad bounds the angles samples carry: a million radians, some
// 159,000 turns (an IMU that reports its heading unwrapped stays far below
// it after days of turning). Beyond it a float64 keeps less than a
// nanoradian of the angle's place within its turn, and the value is no
// measurement: taken, it wrapped to an arbitrary heading, which the robot
// applied (IMU headings are not gated by default).
const maxAngleRad = 1e6

// anglesOK reports whether every v is finite and within maxAngleRad.
func anglesOK(v ...float64) bool { return within(maxAngleRad, v) }

// within reports whether every v is finite and within limit of 0.
func within(limit float64, v []float64) bool {
	for _, x := range v {
		if !(math.Abs(x) <= limit) {
			return false
		}
	}
	return true
}

// maxFieldM bounds the field coordinates and lengths samples carry (fix
// positions, a re-seed's pose, a landmark range, a fix's mount): a
// hundred thousand kilometres, more than twice around the Earth. Within
// it a float64 keeps 15 nm (2^-26 m) of a position, below the smallest
// standard deviation a covariance may state (1 um, minVar); beyond it the
// filter's metres and millimetres vanish in rounding while its covariance
// still claims them. Fixes consistently far out were taken by the move
// recovery, and the robot reported itself trusted at 1e20 m.
const maxFieldM = 1e8

// lengthsOK reports whether every v is finite and within maxFieldM of 0.
func lengthsOK(v ...float64) bool { return within(maxFieldM, v) }

// readAt returns the stamp at which a sample stamped stampNs by a source
// that stamps latencyNs (at least 0) after it reads was read; an error
// when that lies before int64's range (a stamp near its least, which the
// subtraction would wrap to one some 292 years ahead).
func readAt(stampNs, latencyNs int64, field string) (int64, error) {
	if stampNs < math.MinInt64+latencyNs {
		return 0, badf("stamp_ns %d less %s %d is before int64's range", stampNs, field, latencyNs)
	}
	return stampNs - latencyNs, nil
}

func badf(format string, args ...any) error {
	return fmt.Errorf("%w: %s", ErrBadSample, fmt.Sprintf(format, args...))
}

// nsAfter returns later - earlier (later >= earlier) without overflow:
// stamps may lie int64's whole range apart, whose difference wraps
// negative in int64 (unsigned two's-complement subtraction, common
// practice).
func nsAfter(later, earlier int64) uint64 { return uint64(later) - uint64(earlier) }

// countDelta returns cur - prev for a counter of the given width, wrapping
// around, as a signed difference.
func countDelta(cur, prev int64, bits int) int64 {
	if bits == 0 || bits == 64 {
		return cur - prev
	}
	d := uint64(cur-prev) & (1<<bits - 1)
	if d >= 1<<(bits-1) {
		return int64(d) - 1<<bits
	}
	return int64(d)
}

// odometryEntry turns o, which passed checkOdometry, into a body step in
// res, which must be the zero odoResult: the entry is built where the
// caller keeps it, not copied out (BenchmarkRobotRates; entries are 520
// bytes). res.has tells whether it holds one. It changes nothing on error,
// with one exception: the counts of a sample refused as an implausible
// jump are kept (jumpCounts) until the next sample of counts says what
// they were. Its travel from the counts before the jump plausible, the
// jump was one bad reading (a glitch on the wire): the sample is taken
// from them and no travel is lost. Otherwise, its travel from the jump's
// counts plausible, the counts started afresh (an encoder controller
// restarted): they become the reference, and only the jump's interval is
// lost. Neither, the sample is refused too and its counts wait in turn.
func (r *Robot) odometryEntry(o *Odometry, res *odoResult) error {
	res.imu = o.IMUHeadingRad
	nw := len(r.cfg.Wheels)
	if cap(r.travel) < nw {
		r.travel = make([]float64, nw)
	}
	travel := r.travel[:nw]
	t0, dtNs, ok := r.interval(o, travel, res)
	if !ok {
		return nil
	}
	if r.cfg.IMU == IMURotation && o.Step == nil && r.lastIMU == nil {
		r.referenceIMU(o, res)
		return nil
	}
	e := &res.e
	e.kind, e.t0, e.t1 = entOdo, t0, o.StampNs
	e.scrub, e.wheels = 0, o.Step == nil
	if o.Step != nil {
		e.step = *o.Step
		r.cfg.Noise.stepNoise(&e.cov, e.step, float64(o.StampNs-t0)*1e-9)
	} else if err := r.solveWheels(o, travel, e, res); err != nil {
		return err
	}
	jump := r.checkJump(e.step, float64(dtNs)*1e-9)
	if jump != nil && o.Counts != nil && r.jumpCounts != nil && r.fromJumpCounts(o, t0, dtNs, res) {
		jump = nil
	}
	if o.Counts != nil && jump != nil {
		jump = r.wrapHint(jump, o.Counts, dtNs)
		r.jumpCounts = append(r.jumpCounts[:0], o.Counts...)
		return jump
	}
	if jump != nil {
		return jump
	}
	r.noteCounts(o)
	r.noteIMU(o)
	if o.Step == nil && r.cfg.IMU != IMURotation {
		r.scrub = res.scrub
	}
	res.has = true
	return nil
}

// fromJumpCounts builds o's entry in res again from its travel since the
// counts of the jump refused just before (jumpCounts), over the same
// interval, and reports whether that step is plausible: if so the counts
// started afresh at the jump, and res holds the entry.
func (r *Robot) fromJumpCounts(o *Odometry, t0, dtNs int64, res *odoResult) bool {
	travel := r.travel[:len(r.cfg.Wheels)]
	for i, w := range r.cfg.Wheels {
		travel[i] = float64(countDelta(o.Counts[i], r.jumpCounts[i], w.CounterBits)) / w.CountsPerM
	}
	imu, gapNs := res.imu, res.gapNs
	*res = odoResult{imu: imu, gapNs: gapNs}
	e := &res.e
	e.kind, e.t0, e.t1 = entOdo, t0, o.StampNs
	e.scrub, e.wheels = 0, true
	if err := r.solveWheels(o, travel, e, res); err != nil {
		return false
	}
	return r.checkJump(e.step, float64(dtNs)*1e-9) == nil
}

// noteCounts makes the counts of a taken odometry sample o the reference
// the next sample of counts is differenced from. A sample
// without counts (a body step, or travels) ends the reference: the next
// sample of counts is a reference again (interval), its interval a gap in
// odometry, as a run's first is (DEVELOPERS.md, "Design: Odometry
// samples"). Kept, the counts before the sample without them gave the
// next one its travel since then, the other sample's included, over its own
// interval: travel counted twice (0.03 m and 0.06 rad off after 0.3 s of
// body steps at 0.1 m/s), or, faster, that sample refused as past
// max_speed_m_per_s (TestCountsAcrossBodySteps).
func (r *Robot) noteCounts(o *Odometry) {
	if o.Counts == nil {
		r.lastCounts = nil
	} else {
		copy(r.lastCounts, o.Counts)
	}
	r.jumpCounts = nil
}

// interval writes each wheel's travel over o's interval into travel and
// returns the interval's start and length. ok is false for a sample of
// counts without a reference (a run's first, or the first after a sample
// without counts), which only sets the reference.
func (r *Robot) interval(o *Odometry, travel []float64, res *odoResult) (t0, dtNs int64, ok bool) {
	if o.Counts == nil {
		copy(travel, o.TravelM)
		t0, dtNs = o.StartNs, o.StampNs-o.StartNs
		if r.started {
			res.gapNs = o.StartNs - r.newest
			t0 = r.newest
		}
		return t0, dtNs, true
	}
	if r.lastCounts == nil {
		if !r.started {
			r.start(o.StampNs)
		} else {
			// The travel since the newest odometry is unknown: a gap.
			res.gapNs = o.StampNs - r.newest
			r.newest = o.StampNs
		}
		r.lastCounts = append([]int64(nil), o.Counts...)
		r.noteIMU(o)
		return 0, 0, false
	}
	for i, w := range r.cfg.Wheels {
		travel[i] = float64(countDelta(o.Counts[i], r.lastCounts[i], w.CounterBits)) / w.CountsPerM
	}
	return r.newest, o.StampNs - r.newest, true
}

// wrapHint adds to jump, the refusal of counts over dtNs, the counter
// width that would explain it: a wheel whose count moved by about
// 2^16 or 2^32 has a counter of that width which wrapped while its
// counter_bits says a wider one (or none). Without the hint a cart with
// 16-bit counters and counter_bits unset read "implausible motion:
// 1.31e+04 m/s" at each wrap and lost that interval's travel, trusted.
func (r *Robot) wrapHint(jump error, counts []int64, dtNs int64) error {
	for i, w := range r.cfg.Wheels {
		d := countDelta(counts[i], r.lastCounts[i], w.CounterBits)
		for _, bits := range []int{16, 32} {
			if w.CounterBits != 0 && w.CounterBits <= bits {
				continue
			}
			wrapped := countDelta(counts[i], r.lastCounts[i], bits)
			if wrapped != d && math.Abs(float64(wrapped)/w.CountsPerM)/(float64(dtNs)*1e-9) <= r.cfg.MaxSpeedMPerS {
				return fmt.Errorf("%w; wheels[%d]'s count moved by %d, as a %d-bit counter does when it wraps: is its counter_bits %d?", jump, i, d, bits, bits)
			}
		}
	}
	return jump
}

// checkJump refuses a step faster than max_speed_m_per_s or
// max_turn_rate_rad_per_s over dt seconds.
func (r *Robot) checkJump(s estimator.Step, dt float64) error {
	if v := math.Hypot(s.ForwardM, s.LeftM) / dt; v > r.cfg.MaxSpeedMPerS {
		return fmt.Errorf("%w: %.3g m/s over %v exceeds max_speed_m_per_s %g%s", ErrAbsurdJump, v, seconds(dt), r.cfg.MaxSpeedMPerS, shortHint(dt))
	} else if w := math.Abs(s.TurnRad) / dt; w > r.cfg.MaxTurnRateRadPerS {
		return fmt.Errorf("%w: %.3g rad/s over %v exceeds max_turn_rate_rad_per_s %g%s", ErrAbsurdJump, w, seconds(dt), r.cfg.MaxTurnRateRadPerS, shortHint(dt))
	}
	return nil
}

// seconds is dt seconds as a duration, for messages (0.000 s said nothing
// of an interval of microseconds).
func seconds(dt float64) time.Duration { return time.Duration(math.Round(dt * 1e9)) }

// shortHint adds to the refusal of a jump over an interval shorter than a
// millisecond that the stamps may not be in nanoseconds: odometry read
// faster than 1 kHz is rare (common practice), while stamps in
// microseconds or milliseconds are a common wiring mistake, and make a
// robot's ordinary motion look a thousand or a million times too fast.
func shortHint(dt float64) string {
	if dt >= 1e-3 {
		return ""
	}
	return " (odometry samples this close: are the stamps in nanoseconds? stamp_ns counts nanoseconds. Or " + burstHint + ")"
}

// burstHint names a common cause of odometry stamped at one instant, or
// microseconds apart: samples stamped when they arrive, which a USB or
// CAN link delivers several at once (common practice), rather than when
// their wheels were read.
const burstHint = "stamped on arrival, several samples in one burst? Stamp each sample when its wheels are read"

// checkOdometry reports what is wrong with o before it is taken: shape,
// finite values, the configuration's needs, and time running backwards.
func (r *Robot) checkOdometry(o *Odometry) error {
	set := 0
	for _, b := range []bool{o.TravelM != nil, o.Counts != nil, o.Step != nil} {
		if b {
			set++
		}
	}
	if set != 1 {
		return badf("odometry needs exactly one of travel_m, counts and step, got %d", set)
	}
	if r.started && o.StampNs == r.newest {
		if o.Counts != nil && slices.Equal(o.Counts, r.lastCounts) {
			return fmt.Errorf("%w: odometry at stamp_ns %d has the newest odometry's stamp and counts: a sample sent twice? (refusing it loses nothing)", ErrRepeated, o.StampNs)
		}
		return fmt.Errorf("%w: odometry stamp_ns %d is the newest odometry's stamp: %s", ErrTimeBackwards, o.StampNs, burstHint)
	}
	if r.started && o.StampNs < r.newest {
		return fmt.Errorf("%w: odometry stamp_ns %d is not after the newest odometry %d%s", ErrTimeBackwards, o.StampNs, r.newest, r.restartHint(o.StampNs))
	}
	if gap := nsAfter(o.StampNs, r.newest); r.started && gap > uint64(r.cfg.MaxOdometryGapNs) {
		return fmt.Errorf("%w: odometry stamp_ns %d is %.0f s after the newest odometry %d, beyond max_odometry_gap_ns %d: a corrupt stamp? If the robot's odometry really stopped that long, start a new run first (a run_start sample, or reckon start-run)",
			ErrTooFarAhead, o.StampNs, float64(gap)*1e-9, r.newest, r.cfg.MaxOdometryGapNs)
	}
	if o.IMUHeadingRad != nil {
		if r.cfg.IMU == IMUNone {
			return fmt.Errorf("%w: imu_heading_rad given but imu_mode is none", ErrNoIMU)
		}
		if !anglesOK(*o.IMUHeadingRad) {
			return badf("imu_heading_rad %v is not an angle (finite, within %g rad of 0)", *o.IMUHeadingRad, maxAngleRad)
		}
	}
	if r.cfg.IMU == IMURotation && o.IMUHeadingRad == nil && o.Step == nil {
		return badf("imu_heading_rad is required with wheel odometry in imu_mode rotation")
	}
	nw := len(r.cfg.Wheels)
	switch {
	case o.Counts != nil:
		if len(o.Counts) != nw {
			return badf("counts has %d entries for %d wheels", len(o.Counts), nw)
		}
		for i, w := range r.cfg.Wheels {
			if w.CountsPerM == 0 {
				return badf("counts given but wheels[%d].counts_per_m is not set", i)
			}
		}
		return nil
	case o.TravelM != nil:
		if nw == 0 {
			return badf("travel_m given but the robot has no wheels")
		}
		if len(o.TravelM) != nw {
			return badf("travel_m has %d entries for %d wheels", len(o.TravelM), nw)
		}
		if !finiteAll(o.TravelM...) {
			return badf("travel_m %v is not finite", o.TravelM)
		}
		// A travel past maxFieldM overflowed the wheel solve, which
		// refused it as "rows do not determine forward, left and turn",
		// naming no field, after taking it.
		if !lengthsOK(o.TravelM...) {
			return badf("travel_m %v is more than %g m in one sample: counts sent as metres?", o.TravelM, float64(maxFieldM))
		}
	default:
		if !finiteAll(o.Step.ForwardM, o.Step.LeftM, o.Step.TurnRad) {
			return badf("step %+v is not finite", *o.Step)
		}
	}
	if o.StartNs >= o.StampNs {
		return fmt.Errorf("%w: start_ns %d is not before stamp_ns %d", ErrTimeBackwards, o.StartNs, o.StampNs)
	}
	// An interval of int64's whole range had a negative length and gave the
	// first sample negative variances.
	if d := nsAfter(o.StampNs, o.StartNs); d > uint64(r.cfg.MaxOdometryGapNs) {
		return badf("the interval from start_ns %d to stamp_ns %d, %.0f s, is longer than max_odometry_gap_ns %d", o.StartNs, o.StampNs, float64(d)*1e-9, r.cfg.MaxOdometryGapNs)
	}
	if r.started && o.StartNs < r.newest {
		return fmt.Errorf("%w: interval starts at %d, before the newest odometry %d%s", ErrTimeBackwards, o.StartNs, r.newest, r.restartHint(o.StartNs))
	}
	return nil
}

// solveWheels builds the rows (DEVELOPERS.md, "Design: Motion prediction") for the wheel travels and solves
// them for the body step.
func (r *Robot) solveWheels(o *Odometry, travel []float64, e *entry, res *odoResult) error {
	n := &r.cfg.Noise
	r.rows = r.rows[:0]
	var dist float64
	for i := range r.cfg.Wheels {
		r.rows = append(r.rows, estimator.Row{
			Coef:  r.wheelCoef[i],
			Value: travel[i],
			Var:   n.WheelVarM2PerM * math.Abs(travel[i]),
		})
		dist += math.Abs(travel[i])
	}
	if len(travel) > 0 {
		dist /= float64(len(travel))
	}
	if r.cfg.IMU == IMURotation {
		turn := estimator.Wrap(*o.IMUHeadingRad - *r.lastIMU)
		r.rows = append(r.rows, estimator.Row{Coef: estimator.TurnCoef(), Value: turn, Var: n.IMUTurnVarRad2PerRad * math.Abs(turn)})
	}
	if r.cfg.NoSideSlip {
		r.rows = append(r.rows, estimator.Row{Coef: estimator.LeftCoef(), Value: 0, Var: n.LateralSlipVarM2PerM * dist})
	}
	var sol estimator.StepSolution
	if err := estimator.SolveStep(r.rows, weightFloor, &sol); err != nil {
		return badf("wheel travels %v: %v", travel, err)
	}
	e.step, e.cov = sol.Step, sol.Cov
	if sol.DOF > 0 {
		if g, err := estimator.GateThreshold(r.cfg.GateProbability, sol.DOF); err == nil && sol.ChiSquare > g {
			// The rows disagree: a wheel slipped. Scale the covariance by the
			// residual variance factor so the step is trusted less
			// (common practice for weighted least squares with a poor fit).
			f := sol.ChiSquare / float64(sol.DOF)
			for k := range e.cov {
				e.cov[k] *= f
			}
			res.slipChi2, res.slipDOF = sol.ChiSquare, sol.DOF
		}
	}
	if r.cfg.IMU != IMURotation {
		// On the turn summed over fixed blocks of time (scrub.go), taken
		// into the robot only when the sample is.
		res.scrub = r.scrub
		e.scrub = n.TurnVarRad2PerRad * res.scrub.charge(e.t0, e.t1, e.step.TurnRad)
		e.cov[8] += e.scrub
	}
	return nil
}

// processNoise writes the process noise that a prediction by step over dtS
// seconds adds to the diagonal (DEVELOPERS.md, "Design: Process noise").
func (r *Robot) processNoise(q *[estimator.MaxStates]float64, step estimator.Step, dtS float64) {
	n := &r.cfg.Noise
	estimator.TimeNoise(q, &r.layout, dtS, r.cfg.HeadingDriftVarPerS(), n.IMUOffsetVarRad2PerS)
	if i := r.layout.Offset(); i >= 0 {
		q[i] += n.IMUOffsetVarRad2PerRad * math.Abs(step.TurnRad)
	}
	c := &r.cfg.Calibration
	if i := r.layout.ForwardScale(); i >= 0 {
		q[i] = c.ForwardScaleVarPerM * math.Hypot(step.ForwardM, step.LeftM)
		q[r.layout.TurnScale()] = c.TurnScaleVarPerRad * math.Abs(step.TurnRad)
	}
	if i := r.layout.RateBias(); i >= 0 {
		q[i] = c.RateBiasVarRad2PerS3 * dtS
	}
}
