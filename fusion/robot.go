package fusion

import (
	"fmt"

	"reckon.example/estimator"
)

// Robot is one robot's estimator. Make it with New; it is not safe for
// concurrent use (the server serialises each robot's inputs).
type Robot struct {
	cfg       Config
	n         int
	gates     estimator.Gates
	agreeGate float64
	landmarks map[string][2]float64

	f       *estimator.Filter
	scratch *estimator.Filter
	ready   bool // IMU offset initialised since the pose was last set

	started bool
	base    checkpoint
	baseT   int64
	newest  int64 // end of the newest odometry interval
	ents    []entry
	head    int
	errs    []entryErr // of the failed entries in ents
	held    []entry    // waiting for odometry, in stamp order

	lastCounts []int64
	lastIMU    *float64 // IMU heading at newest, IMURotation mode
	rows       []estimator.Row
	travel     []float64

	seq   uint64
	steps *stepCollector // nil unless CollectSteps was called
	stats statsState
	trust trustState
	cands []candidate
}

// New returns a robot for the configuration, or an error naming the field at
// fault.
func New(cfg Config) (*Robot, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg = cfg.withDefaults()
	r := &Robot{cfg: cfg, n: 3, landmarks: map[string][2]float64{}}
	if cfg.IMU == IMUAbsolute {
		r.n = 4
	}
	var err error
	if r.gates, err = estimator.NewGates(cfg.GateProbability); err != nil {
		return nil, cfgErr("gate_probability", "%v", err)
	}
	if r.agreeGate, err = estimator.GateThreshold(cfg.Recovery.AgreeProbability, 3); err != nil {
		return nil, cfgErr("recovery.agree_probability", "%v", err)
	}
	for _, l := range cfg.Landmarks {
		r.landmarks[l.ID] = [2]float64{l.XM, l.YM}
	}
	x := make([]float64, r.n)
	p := make([]float64, r.n*r.n)
	x[0], x[1], x[2] = cfg.StartPose.X, cfg.StartPose.Y, cfg.StartPose.Heading
	for i := 0; i < 3; i++ {
		copy(p[i*r.n:i*r.n+3], cfg.StartCov[i*3:i*3+3])
	}
	if r.n == 4 {
		p[15] = 1 // replaced when the first IMU sample initialises the offset
	}
	if r.f, err = estimator.NewFilter(r.n, x, p); err != nil {
		return nil, cfgErr("start_covariance", "%v", err)
	}
	r.scratch, _ = estimator.NewFilter(r.n, x, p)
	r.base = checkpoint{est: r.f.State()}
	r.stats.init()
	r.trust.reasons = TrustNoOdometry
	return r, nil
}

// Config returns the robot's configuration with defaults filled in.
func (r *Robot) Config() Config { return r.cfg }

// StateSize returns 3, or 4 with the IMU offset state.
func (r *Robot) StateSize() int { return r.n }

// NewestNs returns the end of the newest odometry interval (0 before any).
func (r *Robot) NewestNs() int64 { return r.newest }

// WindowStartNs returns the oldest stamp the robot still accepts.
func (r *Robot) WindowStartNs() int64 { return r.baseT }

func (r *Robot) next() Result {
	r.seq++
	return Result{Seq: r.seq}
}

func invalid(res Result, err error) Result {
	res.Verdict, res.Err = VerdictInvalid, err
	return res
}

// refused is the result of an input that failed its checks: it is not
// taken, gets no sequence number, and changes nothing, statistics included.
func refused(err error) Result {
	return Result{Verdict: VerdictInvalid, Err: err}
}

// AddOdometry takes one odometry sample.
func (r *Robot) AddOdometry(o Odometry) Result {
	if err := r.checkOdometry(&o); err != nil {
		return refused(err)
	}
	res := r.next()
	od, err := r.odometryEntry(&o)
	e, imu, gapNs := &od.e, od.imu, od.gapNs
	if err != nil {
		r.stats.count(VerdictInvalid, true)
		return r.finish(invalid(res, err))
	}
	if !od.has { // a reference sample: counts or IMU heading noted
		res.Verdict = VerdictApplied
		if gapNs > 0 {
			res.Events = append(res.Events, Event{Kind: EventOdometryGap, StampNs: o.StampNs, Value: float64(gapNs) * 1e-9})
			r.stats.gaps++
		}
		r.stats.count(VerdictApplied, true)
		return r.finish(res)
	}
	if gapNs > 0 {
		res.Events = append(res.Events, Event{Kind: EventOdometryGap, StampNs: e.t1, Value: float64(gapNs) * 1e-9})
		r.stats.gaps++
	}
	if od.slipDOF > 0 {
		res.Events = append(res.Events, Event{Kind: EventSlipSuspected, StampNs: e.t1, Value: od.slipChi2,
			Detail: fmt.Sprintf("wheel residual chi-square %.1f with %d degrees of freedom", od.slipChi2, od.slipDOF)})
		r.stats.slips++
	}
	e.seq = res.Seq
	if !r.started {
		r.start(e.t0)
	}
	r.appendOdo(*e)
	res.Verdict = VerdictApplied
	r.stats.count(VerdictApplied, true)
	if imu != nil && r.cfg.IMU == IMUAbsolute {
		m, merr := r.imuMeasurement(*imu, 0)
		if merr == nil {
			ins := r.insert(entry{kind: entMeas, t0: e.t1, t1: e.t1, seq: res.Seq, meas: m, imu: true, sensor: r.stats.sensor(imuSensor, r.imuGate())})
			r.decideMeas(&res, ins, imuSensor)
		}
	}
	r.releaseHeld(&res)
	r.trim()
	return r.finish(res)
}

// start begins the history at t with the configured initial estimate.
func (r *Robot) start(t int64) {
	r.started = true
	r.baseT, r.newest = t, t
	r.base = checkpoint{est: r.f.State(), offsetReady: r.ready}
}

// AddHeading takes one absolute IMU heading sample.
func (r *Robot) AddHeading(h Heading) Result {
	if r.cfg.IMU != IMUAbsolute {
		return refused(fmt.Errorf("%w: heading sample for imu_mode %s (send the IMU heading with odometry in rotation mode)", ErrNoIMU, r.cfg.IMU))
	}
	m, err := r.imuMeasurement(h.HeadingRad, h.VarRad2)
	if err != nil {
		return refused(err)
	}
	res := r.next()
	e := entry{kind: entMeas, t0: h.StampNs, t1: h.StampNs, seq: res.Seq, meas: m, imu: true, sensor: r.stats.sensor(imuSensor, r.imuGate())}
	return r.finish(r.addMeasurement(res, e, imuSensor))
}

// AddFix takes one absolute fix.
func (r *Robot) AddFix(fx Fix) Result {
	m, err := r.fixMeasurement(&fx)
	if err != nil {
		return refused(err)
	}
	res := r.next()
	id := fx.SensorID
	if id == "" {
		id = "fix"
	}
	e := entry{kind: entMeas, t0: fx.StampNs, t1: fx.StampNs, seq: res.Seq, meas: m, sensor: r.stats.sensor(id, r.cfg.GateProbability)}
	return r.finish(r.addMeasurement(res, e, id))
}

// addMeasurement inserts, holds or refuses a measurement entry.
func (r *Robot) addMeasurement(res Result, e entry, sensor string) Result {
	t := e.t1
	switch {
	case r.started && t < r.baseT:
		res.Verdict = VerdictTooOld
		res.Err = fmt.Errorf("%w: stamp_ns %d is %.3f s before the newest odometry; the window starts at %d", ErrTooOld, t, float64(r.newest-t)*1e-9, r.baseT)
		r.stats.count(VerdictTooOld, false)
		r.stats.sensorVerdict(e.sensor, VerdictTooOld, 0, 0)
		return res
	case r.started && t <= r.newest:
		ins := r.insert(e)
		r.decideMeas(&res, ins, sensor)
		return res
	case r.started && t-r.newest > r.cfg.MaxHoldAheadNs:
		r.stats.count(VerdictInvalid, false)
		return invalid(res, fmt.Errorf("%w: stamp_ns %d is %.3f s past the newest odometry (max_hold_ahead_ns %d)", ErrTooFarAhead, t, float64(t-r.newest)*1e-9, r.cfg.MaxHoldAheadNs))
	case len(r.held) >= r.cfg.MaxHeld:
		r.stats.count(VerdictInvalid, false)
		return invalid(res, fmt.Errorf("%w: %d held (max_held)", ErrHeldFull, len(r.held)))
	}
	r.hold(e)
	res.Verdict = VerdictHeld
	r.stats.count(VerdictHeld, false)
	return res
}

// hold keeps e in stamp order (arrival order among equal stamps).
func (r *Robot) hold(e entry) {
	i := len(r.held)
	for i > 0 && r.held[i-1].t1 > e.t1 {
		i--
	}
	r.held = append(r.held, entry{})
	copy(r.held[i+1:], r.held[i:])
	r.held[i] = e
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
			r.insertReset(e, &sub)
		} else {
			ins := r.insert(e)
			r.decideMeas(&sub, ins, r.stats.sensors[e.sensor].ID)
		}
		res.Resolved = append(res.Resolved, Resolution{Seq: sub.Seq, Verdict: sub.Verdict, NIS: sub.NIS, Err: sub.Err})
		res.Events = append(res.Events, sub.Events...)
	}
}

// decideMeas turns the outcome of an inserted measurement into its verdict,
// taking it back if it failed.
func (r *Robot) decideMeas(res *Result, ins insertion, sensor string) {
	e := &r.live()[ins.at]
	res.NIS, res.Dim = e.out.NIS, e.out.Dim
	switch {
	case e.failed:
		err := fmt.Errorf("%w: %w", ErrBadSample, r.errOf(e.seq))
		idx := e.sensor
		r.takeBack(ins)
		res.Verdict, res.Err = VerdictInvalid, err
		r.stats.count(VerdictInvalid, false)
		r.stats.sensorVerdict(idx, VerdictInvalid, 0, 0)
		r.trust.fault = true
	case e.out.Gated:
		res.Verdict = VerdictGated
		res.Events = append(res.Events, Event{Kind: EventFixRefused, StampNs: e.t1, SensorID: sensor, Value: e.out.NIS,
			Detail: fmt.Sprintf("NIS %.1f above the %d-dof gate %.1f", e.out.NIS, e.out.Dim, r.gates.For(e.out.Dim))})
		r.stats.count(VerdictGated, false)
		r.stats.sensorVerdict(e.sensor, VerdictGated, e.out.NIS, 0)
		if !e.imu {
			r.trust.refusedRun++
			r.considerRecovery(res, ins.at)
		}
	default:
		res.Verdict = VerdictApplied
		r.stats.count(VerdictApplied, false)
		if e.initialised {
			r.stats.sensorVerdict(e.sensor, VerdictApplied, 0, 0)
		} else {
			r.stats.sensorVerdict(e.sensor, VerdictApplied, e.out.NIS, e.out.Dim)
			if e.imu {
				r.trust.imu.add(e.out.NIS, e.out.Dim)
			} else {
				r.trust.fixes.add(e.out.NIS, e.out.Dim)
			}
		}
		if !e.imu {
			r.trust.refusedRun = 0
			r.trust.fault = false
			r.cands = r.cands[:0]
		}
	}
}

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
		r.insertReset(e, &res)
	default:
		res = r.addMeasurement(res, e, "")
	}
	return r.finish(res)
}

// insertReset inserts a reset entry and forgets what came before it.
func (r *Robot) insertReset(e entry, res *Result) {
	ins := r.insert(e)
	r.dropFront(ins.at + 1)
	r.cands = r.cands[:0]
	r.trust.refusedRun = 0
	res.Verdict = VerdictApplied
	res.Events = append(res.Events, Event{Kind: EventReseeded, StampNs: e.t1})
}

// finish evaluates trust after an input and appends its transitions.
func (r *Robot) finish(res Result) Result {
	r.trust.evaluate(r, &res)
	return res
}

// Sequence returns the arrival sequence number of the last input taken.
func (r *Robot) Sequence() uint64 { return r.seq }

// imuGate is the gate probability IMU headings pass (1: not gated).
func (r *Robot) imuGate() float64 {
	if r.cfg.GateIMU {
		return r.cfg.GateProbability
	}
	return 1
}
