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
	layout    estimator.Layout
	gates     estimator.Gates
	agreeGate float64
	// headingGate is the 1-dof chi-square quantile at
	// recovery.agree_probability: how far a recovered heading may lie from
	// the IMU's before the recovery learns the IMU offset again.
	headingGate float64
	landmarks   map[string]landmarkRef
	// lmAt holds the first state of each landmark block, lm which
	// landmark each stands for, lmVar each landmark's survey error
	// variance (landmarks.go).
	lmAt   []int
	lm     lmTable
	lmVar  []float64
	lmUndo lmUndo
	// offsets, when not nil, keeps what the blocks learnt of each
	// landmark as it becomes final (CollectLandmarkOffsets).
	offsets *offsetCollector
	// cpSize is the length of a packed checkpoint in cps: the filter's
	// packed estimate and, with landmark blocks, lm.
	cpSize int
	// sensorIndex maps a sensor id to its index in cfg.Sensors;
	// sensorBias holds each sensor's first bias state (0: none).
	sensorIndex map[string]int
	sensorBias  []int
	// sensorMount holds each sensor's first mount error state (0: none).
	sensorMount []int
	// lmCorr: a sensor's correlated part is per landmark; marks keeps the
	// last applied fix of each of their landmarks folded into the base
	// (markercorr.go).
	lmCorr bool
	marks  markTable

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
	// cps holds the entries' checkpoints, packed, slot s (from 1) at
	// [(s-1)k, sk) with k the filter's packed size; cpFree are free slots;
	// cpTmp is before's copy of one.
	cps    []float64
	cpFree []int32
	cpTmp  checkpoint
	// restoreErr is a problem RestoreSnapshot found while decoding.
	restoreErr error

	lastCounts []int64
	// jumpCounts are the counts of the last sample, when it was refused as
	// an implausible jump (nil otherwise): the next sample tells whether
	// they were one bad reading or the counts starting afresh (odometry.go).
	jumpCounts []int64
	lastIMU    *float64 // IMU heading at newest, IMURotation mode
	rows       []estimator.Row
	travel     []float64
	// wheelCoef are the wheels' rows' coefficients (estimator.WheelCoef),
	// which the configuration fixes: worked out at every sample, their
	// sines and cosines were about 13 of the 1,050 cache lines a sample
	// touched at robot rates (BenchmarkRatesPathCold under callgrind,
	// session 25).
	wheelCoef [][3]float64
	// quantTurnVar is the variance the latest counts' quantisation gives
	// the counted heading against an IMU's (Config.countsTurnVar).
	quantTurnVar float64

	seq uint64
	// run counts the run starts taken (Run is run+1); bootID is the
	// current run's boot id (run.go).
	run    uint64
	bootID string
	steps  *stepCollector       // nil unless CollectSteps was called
	innov  *innovationCollector // nil unless CollectInnovations was called
	stats  statsState
	trust  trustState
	cands  []candidate
	// slip compares the IMU's turn with the wheels' (slip.go); turnGate
	// and longTurnGate cache the short and the long comparison's 1-dof
	// gates.
	slip                   slipState
	turnGate, longTurnGate float64
	// turnSums are the short and the long comparison's running sums
	// (wheelSums).
	turnSums [2]wheelSums
	// scrub is the block sum the scrub in turns is charged on (scrub.go).
	scrub scrubState
}

// New returns a robot for the configuration, or an error naming the field at
// fault.
func New(cfg Config) (*Robot, error) {
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg = cfg.withDefaults()
	r := &Robot{cfg: cfg, landmarks: map[string]landmarkRef{}, sensorIndex: map[string]int{}}
	for i, s := range cfg.Sensors {
		r.sensorIndex[s.ID] = i
		r.lmCorr = r.lmCorr || s.perLandmark()
	}
	spec, first := cfg.layoutSpec()
	r.sensorBias, r.sensorMount = first, cfg.mountStates()
	var err error
	if r.layout, err = estimator.NewLayout(spec); err != nil {
		return nil, cfgErr("sensors", "%v", err)
	}
	r.n = r.layout.Size()
	if r.gates, err = estimator.NewGates(cfg.GateProbability); err != nil {
		return nil, cfgErr("gate_probability", "%v", err)
	}
	if r.agreeGate, err = estimator.GateThreshold(cfg.Recovery.AgreeProbability, 3); err != nil {
		return nil, cfgErr("recovery.agree_probability", "%v", err)
	}
	if r.headingGate, err = estimator.GateThreshold(cfg.Recovery.AgreeProbability, 1); err != nil {
		return nil, cfgErr("recovery.agree_probability", "%v", err)
	}
	r.lmVar = make([]float64, len(cfg.Landmarks))
	for i := range cfg.Landmarks {
		l := &cfg.Landmarks[i]
		r.lmVar[i] = cfg.landmarkVar(l)
		r.landmarks[l.ID] = landmarkRef{xy: [2]float64{l.XM, l.YM}, id: int32(i + 1), var2: r.lmVar[i]}
	}
	for _, w := range cfg.Wheels {
		r.wheelCoef = append(r.wheelCoef, estimator.WheelCoef(w.XM, w.YM, w.DirectionRad))
	}
	r.quantTurnVar = cfg.countsTurnVar()
	r.lmAt = landmarkBlocks(&r.layout)
	x := make([]float64, r.n)
	p := make([]float64, r.n*r.n)
	x[0], x[1], x[2] = cfg.StartPose.X, cfg.StartPose.Y, cfg.StartPose.Heading
	for i := 0; i < 3; i++ {
		copy(p[i*r.n:i*r.n+3], cfg.StartCov[i*3:i*3+3])
	}
	if o := r.layout.Offset(); o >= 0 {
		p[o*r.n+o] = 1 // replaced when the first IMU sample initialises the offset
	}
	cfg.initialState(&r.layout, x, p)
	if r.f, err = estimator.NewFilter(&r.layout, x, p); err != nil {
		return nil, cfgErr("start_covariance", "%v", err)
	}
	r.scratch, _ = estimator.NewFilter(&r.layout, x, p)
	r.cpSize = r.f.PackedSize()
	if len(r.lmAt) > 0 {
		r.cpSize += lmWords
	}
	r.base = checkpoint{est: r.f.State()}
	r.stats.init()
	r.trust.reasons = TrustNoOdometry
	return r, nil
}

// Config returns the robot's configuration with defaults filled in.
func (r *Robot) Config() Config { return r.cfg }

// StateSize returns the number of states: 3 for the pose, and one for the
// IMU offset, the odometry calibration states and the bias blocks as
// configured (DEVELOPERS.md, "Design: State").
func (r *Robot) StateSize() int { return r.n }

// Layout returns the layout of the robot's state: where the IMU offset,
// the odometry calibration states and the sensors' bias blocks are.
func (r *Robot) Layout() *estimator.Layout { return &r.layout }

// SensorBias returns the index of the first state of the bias block of
// the configured sensor id, or 0 if it has none (white errors or no such
// sensor).
func (r *Robot) SensorBias(id string) int {
	if i, ok := r.sensorIndex[id]; ok {
		return r.sensorBias[i]
	}
	return 0
}

// Estimate returns the whole estimate at the newest odometry: every state
// of the layout, with its covariance.
func (r *Robot) Estimate() estimator.State { return r.f.State() }

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
	var od odoResult
	err := r.odometryEntry(&o, &od)
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
		if imu != nil && r.cfg.IMU == IMUAbsolute && gapNs > 0 {
			// A reference within a run (counts after travels or a body step) keeps
			// its IMU heading, as a heading sample at its stamp would be
			// taken; a run's first, whose stamp starts the history, still
			// does not.
			r.odometryHeading(&res, o.StampNs, *imu)
		}
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
	r.slipInflate(e)
	// A measurement held for this interval (an IMU heading stamped between
	// two odometry samples) goes in as the interval is appended, unless
	// the sample's own IMU heading goes in first.
	split := (imu == nil || r.cfg.IMU != IMUAbsolute) && r.heldInside(e)
	if !split {
		r.appendOdo(e)
	}
	res.Verdict = VerdictApplied
	r.stats.count(VerdictApplied, true)
	if split {
		r.appendSplit(e, &res)
	}
	if imu != nil && r.cfg.IMU == IMUAbsolute {
		r.odometryHeading(&res, e.t1, *imu)
	}
	r.releaseHeld(&res)
	r.trim()
	return r.finish(res)
}

// start begins the history at t with the configured initial estimate.
// Not inlined: its copy of the estimate (1.3 kB) would sit in the frames
// of the per-sample paths that call it once (AddOdometry, interval), and
// push what they call further down the stack (BenchmarkRobotRates).
//
//go:noinline
func (r *Robot) start(t int64) {
	r.started = true
	r.baseT, r.newest = t, t
	r.base = checkpoint{est: r.f.State(), offsetReady: r.ready, lm: r.lm}
}

// Sequence returns the arrival sequence number of the last input taken.
func (r *Robot) Sequence() uint64 { return r.seq }

// SkipTo makes seq the sequence number of the last input taken when it is
// later than the robot's: the numbers between belong to inputs the robot
// never saw, as a replay past a gap in a journal meets them, so that the
// inputs after the gap keep the numbers they arrived with (and a held
// input's resolution names it by its own). It changes nothing else.
func (r *Robot) SkipTo(seq uint64) {
	if seq > r.seq {
		r.seq = seq
	}
}
