// Package fusiontest is the test harness of package fusion: it simulates a
// small cart driving the aisles of a greenhouse, with
// ground truth: encoder wheels of three layouts with distance-proportional
// noise and occasional slip, an IMU whose heading zero drifts, and a camera
// that sees pose markers with latency, jitter and a fraction of outliers.
// It is deterministic for a seed and has no I/O; the tests of every layer,
// the benchmarks and the demo use it. Its draws are its own: it imports fusion
// only for the configuration it describes and to feed a robot.
//
// # Real error processes
//
// Scenario.Errors switches on the error processes that real robots show and
// a white-noise filter does not describe (each zero value is off, and off
// leaves every draw as before; they draw from a random source of their own):
//
//   - CameraTauS, CameraCorrelated: first-order Gauss-Markov camera errors
//     in each component of a fix (2.85 s gives a correlation of 0.9
//     between fixes 0.3 s apart);
//   - CameraTailDOF, CameraTailCore: Student-t camera errors with 3 to 5
//     degrees of freedom, scaled to the stated standard deviation (its
//     total, or with CameraTailCore its core);
//   - CameraContamination, CameraContaminationScale: a fraction of fixes
//     with errors five times the stated standard deviation;
//   - ForwardScale, TurnScale: odometry scale errors (3% to 15%);
//     WheelScales: each wheel's own;
//   - CameraStampLateNs, CameraStampAtArrival: fixes stamped after their
//     capture.
//
// Layout Commanded is a differential drive without encoders that reports
// body steps from its commanded velocities, its truth departing from the
// command by a noise per second of travel (CommandedForwardVarM2PerS and
// its siblings). MarkerCount maps 10 to 20 markers along the aisles
// (AisleMarkers) for range and bearing fixes. SquareM drives the
// bidirectional square test of a differential drive instead of the aisles,
// OdometryNoiseScale scales the odometry's noise. FieldFrame moves and rotates
// the whole field frame (truth, fixes, map and start pose) for invariance
// tests; ToLocal and CovToLocal take results back.
//
// # Configurations and measurements
//
// Scenario.Config (and Sim.Config, with the run's start pose) describes the
// scenario to the filter; WhiteConfig is the same with white-noise
// assumptions, TrueModelConfig the one that declares the true error
// processes with the filter's own models. MonteCarloNEES runs the NEES test of Bar-Shalom, Li and
// Kirubarajan (2001, sec. 5.4.2) over many runs; TrustMonitor and
// TrustViolations measure from truth how long the estimate was trusted
// while outside its 99.9% region.
package fusiontest

import (
	"container/heap"
	"fmt"
	"math"
	"math/rand/v2"

	"reckon.example/estimator"
	"reckon.example/fusion"
)

// Layout is a wheel layout, named by what determines the turn.
type Layout uint8

const (
	// FreeWheelTurn: the turn comes from the difference of two free-rolling
	// forward wheels; a lateral wheel gives sideways travel; an absolute IMU
	// is optional.
	FreeWheelTurn Layout = iota
	// GyroTurn: the turn comes from the IMU's heading difference (IMU
	// rotation mode); one forward and one lateral wheel give the travel.
	GyroTurn
	// DriveWheelTurn: the turn comes from the difference of the two driven
	// wheels' encoders (a differential drive, no side slip).
	DriveWheelTurn
	// Commanded: a differential drive without encoders that reports body
	// steps computed from its commanded velocities; the truth departs from
	// the command by a noise per second of travel (CommandedNoise).
	Commanded
)

// String names the layout.
func (l Layout) String() string {
	switch l {
	case FreeWheelTurn:
		return "free-wheel-turn"
	case GyroTurn:
		return "gyro-turn"
	case DriveWheelTurn:
		return "drive-wheel-turn"
	case Commanded:
		return "commanded"
	}
	return fmt.Sprintf("layout(%d)", uint8(l))
}

// Bump moves the cart by hand at AtS seconds without its wheels turning.
type Bump struct {
	AtS            float64
	DXM, DYM, DRad float64
}

// Scenario configures a simulated run. Zero fields take the defaults given.
type Scenario struct {
	Layout Layout
	Seed   uint64
	// DurationS is the length of the run (60 s).
	DurationS float64
	// OdometryHz (200), IMUHz (100; 0 with IMU false), CameraHz (10).
	OdometryHz, IMUHz, CameraHz float64
	// IMU adds an absolute IMU to the layouts that do not need one.
	IMU bool
	// Counts sends cumulative 16-bit encoder counts instead of travel.
	Counts bool
	// LatencyMinS and LatencyMaxS bound the camera's delay (0.05 to 0.2 s).
	LatencyMinS, LatencyMaxS float64
	// OutlierFraction of camera fixes are wrong by metres.
	OutlierFraction float64
	// SlipPerS is the rate of wheel slip episodes.
	SlipPerS float64
	// Markers makes the camera report range and bearing to the greenhouse's
	// post markers instead of its own pose.
	Markers bool
	// MarkerCount, if positive, maps that many markers along the aisles
	// (AisleMarkers) instead of the posts, and turns Markers on.
	MarkerCount int
	// NamePoseMarkers makes each pose fix name the marker the camera took
	// it from (Fix.Marker): the nearest of the map's markers in view, as
	// the landmark camera chooses (within 5 m and 1 rad of the camera's
	// axis); a fix with none in view names none, and an outlier names the
	// marker it was read from. Without Markers only.
	NamePoseMarkers bool
	// NoiseFree turns off every noise source (outliers, slip and Errors too).
	NoiseFree bool
	// Bump, if set, moves the cart by hand.
	Bump *Bump
	// SpeedMPerS is the cruising speed (0.4).
	SpeedMPerS float64
	// FigureEight drives round the two beds beside the first aisle in
	// turn (up the aisle, left round one bed and back, up again, right
	// round the other and back) instead of working up the greenhouse
	// aisle by aisle: the cart stays among the aisle markers
	// (MarkerCount) however long the run, and turns both ways.
	FigureEight bool
	// SquareM, if positive, drives the bidirectional square test of that
	// side instead of the aisles (Borenstein and Feng, IEEE Transactions
	// on Robotics and Automation 12(6), 1996): from a pause of 2 s, a
	// clockwise square (a side, then a 90-degree turn to the right in
	// place at about 0.5 rad/s, four times), a pause of 2 s, a
	// counter-clockwise one, and again. Layouts DriveWheelTurn and
	// Commanded only.
	SquareM float64
	// PauseS is the square test's pause before each square (2 s).
	PauseS float64
	// IMUOnOdometry stamps the IMU's headings on the odometry's grid
	// instead of 3 ms off it.
	IMUOnOdometry bool
	// Heading, where a field is set, replaces the rotation noise the
	// simulator draws and configures alike.
	Heading HeadingNoise
	// OdometryNoiseScale, if positive, multiplies the variances of the
	// odometry's noise (wheel travel, sideways slip, scrub and the heading's
	// random walk), drawn and configured alike (1).
	OdometryNoiseScale float64
	// SensorCovariance makes the camera's fixes carry no covariance of
	// their own, so that they take the one the filter's configuration gives
	// its sensor (as a camera that does not report one).
	SensorCovariance bool

	// The real error processes (errors.go); zero turns each off.
	Errors
	// FieldFrame is the pose of the simulator's own frame in the field
	// frame: truth, fixes, landmarks and the start pose are reported moved
	// and rotated by it (a robot far from the field origin). The zero pose
	// leaves every output bit for bit as without it.
	FieldFrame estimator.Pose
}

// HeadingNoise is the noise that turns the cart's heading or the IMU's
// reading of it; a zero field keeps the simulator's default.
type HeadingNoise struct {
	// TurnVarRad2PerRad is the scrub per radian turned, HeadingVarRad2PerS
	// the heading's random walk per second (set, they replace the default
	// and OdometryNoiseScale's multiple of it).
	TurnVarRad2PerRad, HeadingVarRad2PerS float64
	// IMUStdRad is the standard deviation of an absolute IMU heading
	// (0.005 rad); IMUOffsetVarRad2PerS the random walk of its zero (1e-7).
	IMUStdRad, IMUOffsetVarRad2PerS float64
	// CameraStdRad is the standard deviation of a pose fix's heading
	// (0.02 rad).
	CameraStdRad float64
}

func (s *Scenario) defaults() {
	def := func(v *float64, d float64) {
		if *v == 0 {
			*v = d
		}
	}
	def(&s.DurationS, 60)
	def(&s.OdometryHz, 200)
	def(&s.CameraHz, 10)
	def(&s.LatencyMinS, 0.05)
	def(&s.LatencyMaxS, 0.2)
	def(&s.SpeedMPerS, 0.4)
	def(&s.PauseS, 2)
	def(&s.Heading.IMUStdRad, imuHeadingStdRad)
	def(&s.Heading.IMUOffsetVarRad2PerS, imuOffsetVarRad2PerS)
	def(&s.Heading.CameraStdRad, cameraStdRad)
	if s.IMUHz == 0 && (s.IMU || s.Layout == GyroTurn) {
		s.IMUHz = 100
	}
	if s.MarkerCount > 0 {
		s.Markers = true
	}
	if s.NoiseFree {
		s.OutlierFraction, s.SlipPerS = 0, 0
		s.Errors = Errors{}
	}
	s.Errors.defaults()
}

// CameraMount is the camera's mount on the cart: 0.15 m ahead of the reference
// point, facing forward.
func CameraMount() estimator.Pose { return estimator.Pose{X: 0.15, Y: 0, Heading: 0} }

// Camera noise: 3 cm per axis and 0.02 rad for pose fixes; 2 cm and 0.01 rad
// for range and bearing.
const (
	cameraStdM, cameraStdRad = 0.03, 0.02
	rangeStdM, bearingStdRad = 0.02, 0.01
	countsPerM, counterBits  = 40000, 16
	imuHeadingStdRad         = 0.005
	imuOffsetVarRad2PerS     = 1e-7
	startStdM, startStdRad   = 0.05, 0.035
)

// Markers are the greenhouse's post markers: a row at each end of the aisles.
func Markers() []fusion.Landmark {
	var out []fusion.Landmark
	for i := 0; i < 5; i++ {
		y := float64(i) * 1.5
		out = append(out,
			fusion.Landmark{ID: fmt.Sprintf("post-w%d", i), XM: -1.2, YM: y},
			fusion.Landmark{ID: fmt.Sprintf("post-e%d", i), XM: 9.2, YM: y})
	}
	return out
}

// Config returns the fusion configuration that matches the scenario: its
// wheel layout, IMU mode and noise (the simulator draws its noise from the
// same model), with move recovery on.
func (s Scenario) Config() fusion.Config {
	s.defaults()
	n := fusion.DefaultNoise()
	if k := s.OdometryNoiseScale; k > 0 {
		n.WheelVarM2PerM *= k
		n.LateralSlipVarM2PerM *= k
		n.TurnVarRad2PerRad *= k
		n.HeadingVarRad2PerS *= k
	}
	if h := s.Heading; h.TurnVarRad2PerRad > 0 {
		n.TurnVarRad2PerRad = h.TurnVarRad2PerRad
	}
	if h := s.Heading; h.HeadingVarRad2PerS > 0 {
		n.HeadingVarRad2PerS = h.HeadingVarRad2PerS
	}
	n.IMUHeadingVarRad2 = s.Heading.IMUStdRad * s.Heading.IMUStdRad
	n.IMUOffsetVarRad2PerS = s.Heading.IMUOffsetVarRad2PerS
	c := fusion.Config{
		Noise:     n,
		Recovery:  fusion.Recovery{Enabled: true},
		StartCov:  []float64{startStdM * startStdM, 0, 0, 0, startStdM * startStdM, 0, 0, 0, startStdRad * startStdRad},
		Landmarks: s.Landmarks(),
		Sensors: []fusion.Sensor{{ID: "camera", Kind: fusion.FixPose, Mount: CameraMount(),
			Cov: []float64{cameraStdM * cameraStdM, 0, 0, 0, cameraStdM * cameraStdM, 0, 0, 0, s.Heading.CameraStdRad * s.Heading.CameraStdRad}}},
	}
	if s.Markers {
		c.Sensors[0].Kind = fusion.FixLandmark
		c.Sensors[0].Cov = []float64{rangeStdM * rangeStdM, 0, 0, bearingStdRad * bearingStdRad}
	}
	cpm, bits := 0.0, 0
	if s.Counts {
		cpm, bits = countsPerM, counterBits
	}
	w := func(name string, x, y, dir float64) fusion.Wheel {
		return fusion.Wheel{Name: name, XM: x, YM: y, DirectionRad: dir, CountsPerM: cpm, CounterBits: bits}
	}
	switch s.Layout {
	case FreeWheelTurn:
		c.Wheels = []fusion.Wheel{w("left", 0, 0.12, 0), w("right", 0, -0.12, 0), w("lateral", -0.08, 0, math.Pi/2)}
	case GyroTurn:
		c.Wheels = []fusion.Wheel{w("forward", 0, 0.10, 0), w("lateral", -0.08, 0, math.Pi/2)}
		c.IMU = fusion.IMURotation
	case DriveWheelTurn:
		c.Wheels = []fusion.Wheel{w("left", 0, 0.2, 0), w("right", 0, -0.2, 0)}
		c.NoSideSlip = true
	case Commanded:
		c.Noise = commandedWhiteNoise(n, s.SpeedMPerS)
	}
	if s.IMU && s.Layout != GyroTurn {
		c.IMU = fusion.IMUAbsolute
	}
	return c
}

// Input is one sample in arrival order, with the truth at its stamp.
type Input struct {
	ArrivalNs int64
	Odometry  *fusion.Odometry
	Heading   *fusion.Heading
	Fix       *fusion.Fix
	// Truth is the cart's true pose at the sample's stamp.
	Truth estimator.Pose
	// Outlier marks a camera fix that the simulator made wrong on purpose.
	Outlier bool
	// Bumped is true from the bump on.
	Bumped bool
}

// StampNs returns the sample's own stamp.
func (in *Input) StampNs() int64 {
	switch {
	case in.Odometry != nil:
		return in.Odometry.StampNs
	case in.Heading != nil:
		return in.Heading.StampNs
	default:
		return in.Fix.StampNs
	}
}

// segment is a stretch of constant body velocity.
type segment struct {
	durNs   int64
	v, u, w float64 // forward m/s, left m/s, turn rad/s
}

// Sim generates a scenario's samples one at a time, in arrival order, with
// memory bounded by the camera's latency.
type Sim struct {
	s     Scenario
	cfg   fusion.Config
	rng   *rand.Rand
	route []segment
	seg   int
	left  int64 // ns left in the current segment

	t     int64
	truth estimator.Pose
	endNs int64

	nextOdo, nextIMU, nextCam, startOdo int64
	travel                              []float64 // true travel since the last odometry sample
	pos                                 []float64 // noisy cumulative wheel positions, m
	slipWheel                           int
	slipUntil                           int64
	imuOffset                           float64
	bumped                              bool
	cmd                                 estimator.Step // commanded motion since the last odometry sample
	movingS                             float64        // seconds of commanded motion since the last event
	turnAbs                             float64        // true angle turned since the last odometry sample, rad
	gyroErr                             float64        // the gyro's accumulated heading error, rad

	errs     errorState // the real error processes, with their own random source
	gyroBias float64    // the gyro's rate bias (Errors.GyroBiasRadPerS), rad/s
	// survey holds each marker's survey error (Errors.LandmarkSurveyM)
	// once drawn, by id.
	survey map[string][2]float64

	queue queue
	seq   int64
	done  bool
}

// New returns a simulator for the scenario.
func New(s Scenario) *Sim {
	s.defaults()
	sm := &Sim{s: s, cfg: s.Config(), rng: rand.New(rand.NewPCG(s.Seed, s.Seed^0x9e3779b97f4a7c15))}
	sm.route = greenhouseRoute(s.SpeedMPerS, s.Layout != DriveWheelTurn && s.Layout != Commanded)
	if s.FigureEight {
		sm.route = figureEightRoute(sm.route)
	}
	if s.SquareM > 0 {
		if s.Layout != DriveWheelTurn && s.Layout != Commanded {
			panic(fmt.Sprintf("fusiontest: the square test needs a differential drive, not layout %v", s.Layout))
		}
		sm.route = squareRoute(s.SquareM, s.SpeedMPerS, s.PauseS)
	}
	sm.left = sm.route[0].durNs
	sm.endNs = int64(s.DurationS * 1e9)
	sm.truth = estimator.Pose{X: 0, Y: 0, Heading: 0}
	sm.travel = make([]float64, len(sm.cfg.Wheels))
	sm.pos = make([]float64, len(sm.cfg.Wheels))
	sm.slipWheel = -1
	sm.nextOdo = 0
	sm.nextIMU = 3e6 // the IMU's own clock phase: 3 ms off the encoders'
	if s.IMUOnOdometry {
		sm.nextIMU = 0
	}
	sm.nextCam = 50e6
	sm.imuOffset = 0.7 // the IMU zeroed at power-on, facing elsewhere
	sm.errs = newErrorState(s.Seed)
	if s.GyroBiasRadPerS > 0 { // drawn only then: the other processes' draws stay as they were
		sm.gyroBias = sm.errs.rng.NormFloat64() * s.GyroBiasRadPerS
	}
	return sm
}

// Config returns the fusion configuration matching the simulator, with the
// starting pose drawn around the truth from the starting covariance (so that
// the filter's initial error is consistent with its covariance).
func (sm *Sim) Config() fusion.Config {
	return sm.withStart(sm.cfg)
}

// withStart returns c with the run's starting pose.
func (sm *Sim) withStart(c fusion.Config) fusion.Config {
	r := rand.New(rand.NewPCG(sm.s.Seed+1, 7))
	if !sm.s.NoiseFree {
		c.StartPose = estimator.Pose{X: r.NormFloat64() * startStdM, Y: r.NormFloat64() * startStdM, Heading: r.NormFloat64() * startStdRad}
	}
	c.StartPose = sm.s.ToField(c.StartPose)
	return c
}

// greenhouseRoute drives up an aisle, turns round the bed's end into the
// next aisle, drives back, and so on; a holonomic cart sidesteps at the ends.
// Durations are multiples of 20 ms so that segments start on both the 50 Hz
// and the 500 Hz sample grids.
func greenhouseRoute(speed float64, holonomic bool) []segment {
	grid := func(s float64) int64 { return int64(math.Round(s/0.02)) * 20e6 }
	const aisle, radius = 8.0, 0.75
	straight := segment{durNs: grid(aisle / speed), v: speed}
	turnDur := grid(math.Pi * radius / speed)
	w := math.Pi / (float64(turnDur) * 1e-9)
	v := w * radius
	route := []segment{{durNs: grid(1)}, straight, {durNs: turnDur, v: v, w: w}}
	if holonomic {
		route = append(route, segment{durNs: grid(1), u: -0.2}, segment{durNs: grid(1), u: 0.2})
	}
	route = append(route, straight, segment{durNs: turnDur, v: v, w: -w})
	if holonomic {
		route = append(route, segment{durNs: grid(1.5), v: 0.1, u: 0.15, w: 0.2}, segment{durNs: grid(1.5), v: 0.1, u: -0.15, w: -0.2})
	}
	return route // it starts and repeats with a pause to pick tomatoes
}

// figureEightRoute turns the greenhouse route r into a figure of eight
// round the beds either side of the first aisle: r's lap with both its
// half-circle turns to the left (a closed loop round the bed on the left),
// then with both to the right. The segments and their durations are r's.
func figureEightRoute(r []segment) []segment {
	var out []segment
	for _, sign := range []float64{1, -1} {
		for _, sg := range r {
			if sg.w != 0 && sg.u == 0 {
				sg.w = sign * math.Abs(sg.w)
			}
			out = append(out, sg)
		}
	}
	return out
}

// squareRoute is the bidirectional square test of side sideM at speed:
// a pause of pauseS, four sides each followed by a turn to the right in
// place, a pause, four sides each followed by a turn to the left.
func squareRoute(sideM, speed, pauseS float64) []segment {
	grid := func(s float64) int64 { return int64(math.Round(s/0.02)) * 20e6 }
	turnDur := grid(math.Pi / 2 / 0.5)
	w := math.Pi / 2 / (float64(turnDur) * 1e-9)
	side := segment{durNs: grid(sideM / speed), v: sideM / (float64(grid(sideM/speed)) * 1e-9)}
	var route []segment
	for _, sign := range []float64{-1, 1} {
		route = append(route, segment{durNs: grid(pauseS)})
		for range 4 {
			route = append(route, side, segment{durNs: turnDur, w: sign * w})
		}
	}
	return route
}

// advance moves the truth to time t, adding the true wheel travels.
func (sm *Sim) advance(t int64) {
	for sm.t < t {
		dt := t - sm.t
		if dt > sm.left {
			dt = sm.left
		}
		seg := sm.route[sm.seg]
		f := float64(dt) * 1e-9
		step := estimator.Step{ForwardM: seg.v * f, LeftM: seg.u * f, TurnRad: seg.w * f}
		// What the odometry reports: the step scaled by its scale errors.
		fs, ts := 1+sm.s.ForwardScale, 1+sm.s.TurnScale
		for i, w := range sm.cfg.Wheels {
			c := estimator.WheelCoef(w.XM, w.YM, w.DirectionRad)
			k := 1.0
			if i < len(sm.s.WheelScales) {
				k += sm.s.WheelScales[i]
			}
			sm.travel[i] += k * (c[0]*step.ForwardM*fs + c[1]*step.LeftM*fs + c[2]*step.TurnRad*ts)
		}
		sm.turnAbs += math.Abs(step.TurnRad)
		sm.cmd.ForwardM += step.ForwardM * fs
		sm.cmd.LeftM += step.LeftM * fs
		sm.cmd.TurnRad += step.TurnRad * ts
		if seg.v != 0 || seg.u != 0 || seg.w != 0 {
			sm.movingS += f
		}
		sm.truth = estimator.Advance(sm.truth, step)
		sm.t += dt
		sm.left -= dt
		if sm.left == 0 {
			sm.seg = (sm.seg + 1) % len(sm.route)
			sm.left = sm.route[sm.seg].durNs
		}
	}
	if b := sm.s.Bump; b != nil && !sm.bumped && float64(t)*1e-9 >= b.AtS {
		sm.bumped = true
		sm.truth = estimator.Pose{X: sm.truth.X + b.DXM, Y: sm.truth.Y + b.DYM, Heading: estimator.Wrap(sm.truth.Heading + b.DRad)}
	}
}

func (sm *Sim) gauss(std float64) float64 {
	if sm.s.NoiseFree {
		return 0
	}
	return sm.rng.NormFloat64() * std
}

// Next returns the next input in arrival order, or false at the end.
func (sm *Sim) Next() (Input, bool) {
	for {
		if sm.queue.Len() > 0 && (sm.done || sm.queue[0].ArrivalNs <= sm.t) {
			return heap.Pop(&sm.queue).(item).Input, true
		}
		if sm.done {
			return Input{}, false
		}
		sm.generate()
	}
}

// generate produces the samples at the next event time.
func (sm *Sim) generate() {
	t := sm.nextOdo
	if sm.s.IMUHz > 0 && sm.cfg.IMU == fusion.IMUAbsolute && sm.nextIMU < t {
		t = sm.nextIMU
	}
	if sm.nextCam < t {
		t = sm.nextCam
	}
	if t > sm.endNs {
		sm.done = true
		return
	}
	prevT, prev := sm.t, sm.truth
	sm.advance(t)
	if t > prevT && !sm.s.NoiseFree {
		// Rotation the wheels do not see: scrub in turns and a heading random
		// walk, drawn from the filter's own model.
		turn := math.Abs(estimator.Wrap(sm.truth.Heading - prev.Heading))
		if sm.s.Layout == Commanded {
			turn = 0 // no wheels to scrub; commandedMotion draws its own noise
			sm.commandedMotion()
		}
		v := sm.cfg.Noise.TurnVarRad2PerRad*turn + sm.cfg.Noise.HeadingVarRad2PerS*float64(t-prevT)*1e-9
		if sm.cfg.NoSideSlip {
			// Sideways slip of a differential drive, per metre driven.
			d := math.Hypot(sm.truth.X-prev.X, sm.truth.Y-prev.Y)
			side := sm.rng.NormFloat64() * math.Sqrt(sm.cfg.Noise.LateralSlipVarM2PerM*d)
			sh, ch := math.Sincos(sm.truth.Heading)
			sm.truth.X -= sh * side
			sm.truth.Y += ch * side
		}
		sm.truth.Heading = estimator.Wrap(sm.truth.Heading + sm.rng.NormFloat64()*math.Sqrt(v))
	}
	// A gyro whose scale is off reads every turn, the hand's included, that
	// fraction wrong.
	sm.imuOffset += sm.s.GyroScale * estimator.Wrap(sm.truth.Heading-prev.Heading)
	// A gyro's rate bias moves the zero at its rate.
	sm.imuOffset += sm.gyroBias * float64(t-prevT) * 1e-9
	if !sm.s.NoiseFree && t > prevT {
		sm.imuOffset += sm.rng.NormFloat64() * math.Sqrt(sm.s.Heading.IMUOffsetVarRad2PerS*float64(t-prevT)*1e-9)
	}
	if t == sm.nextOdo {
		sm.emitOdometry(t)
		sm.nextOdo = t + int64(math.Round(1e9/sm.s.OdometryHz))
	}
	if sm.s.IMUHz > 0 && sm.cfg.IMU == fusion.IMUAbsolute && t == sm.nextIMU {
		h := estimator.Wrap(sm.truth.Heading + sm.imuOffset + sm.gauss(sm.s.Heading.IMUStdRad))
		jitter := int64(1e6 + sm.rng.Float64()*4e6)
		late := sm.s.IMUStampLateNs // stamped on arrival of a lagging IMU
		sm.push(Input{ArrivalNs: t + late + jitter, Heading: &fusion.Heading{StampNs: t + late, HeadingRad: h}, Truth: sm.s.ToField(sm.truth), Bumped: sm.bumped})
		sm.nextIMU = t + int64(math.Round(1e9/sm.s.IMUHz))
	}
	if t == sm.nextCam {
		sm.emitCamera(t)
		sm.nextCam = t + int64(math.Round(1e9/sm.s.CameraHz))
	}
}

func (sm *Sim) emitOdometry(t int64) {
	noise := sm.cfg.Noise.WheelVarM2PerM
	if t > sm.startOdo && !sm.s.NoiseFree && len(sm.travel) > 0 && sm.s.SlipPerS > 0 && sm.rng.Float64() < sm.s.SlipPerS/sm.s.OdometryHz {
		sm.slipWheel, sm.slipUntil = sm.rng.IntN(len(sm.travel)), t+300e6
	}
	travel := make([]float64, len(sm.travel))
	for i, tr := range sm.travel {
		travel[i] = tr + sm.gauss(math.Sqrt(noise*math.Abs(tr)))
		if i == sm.slipWheel && t < sm.slipUntil {
			travel[i] *= 0.5
		}
		sm.pos[i] += travel[i]
		sm.travel[i] = 0
	}
	o := &fusion.Odometry{StampNs: t}
	if sm.s.Layout == Commanded {
		if t == 0 {
			return
		}
		step := sm.cmd
		o.StartNs, o.Step = sm.startOdo, &step
		sm.cmd = estimator.Step{}
	} else if sm.s.Counts {
		o.Counts = make([]int64, len(travel))
		for i, p := range sm.pos {
			c := int64(math.Floor(p * countsPerM))
			o.Counts[i] = c & (1<<counterBits - 1) // the counter's own width
		}
	} else {
		if t == 0 {
			return // travel needs an interval; the first tick starts it
		}
		o.StartNs, o.TravelM = sm.startOdo, travel
	}
	if sm.cfg.IMU == fusion.IMURotation {
		// The gyro's heading errs by a random walk per radian turned, the
		// filter's model of an IMU turn row (imu_turn_var_rad2_per_rad;
		// DEVELOPERS.md, "Design: Process noise"). A reading noise drawn
		// afresh per sample, as before, has differences of a constant
		// variance per sample, which no rate per radian describes: at 200 Hz
		// the filter took the gyro to be far better than it was.
		sm.gyroErr += sm.gauss(math.Sqrt(sm.cfg.Noise.IMUTurnVarRad2PerRad * sm.turnAbs))
		sm.turnAbs = 0
		h := estimator.Wrap(sm.truth.Heading + sm.imuOffset + sm.gyroErr)
		o.IMUHeadingRad = &h
	}
	sm.startOdo = t
	sm.push(Input{ArrivalNs: t + 1e6, Odometry: o, Truth: sm.s.ToField(sm.truth), Bumped: sm.bumped})
}

// surveyed returns where marker m (the i-th of the local markers) really
// is: its mapped position plus its survey error (Errors.LandmarkSurveyM),
// drawn from a source of its own seeded by the run and the marker.
func (sm *Sim) surveyed(i int, m fusion.Landmark) (float64, float64) {
	sd := sm.s.LandmarkSurveyM
	if sd == 0 {
		return m.XM, m.YM
	}
	off, ok := sm.survey[m.ID]
	if !ok {
		r := rand.New(rand.NewPCG(sm.s.Seed^0x5eed, uint64(i)))
		off = [2]float64{sd * r.NormFloat64(), sd * r.NormFloat64()}
		if sm.survey == nil {
			sm.survey = map[string][2]float64{}
		}
		sm.survey[m.ID] = off
	}
	return m.XM + off[0], m.YM + off[1]
}

// markerInView returns the index of the nearest of marks that camera pose
// cam sees (within 5 m, and within 1 rad of its axis), or -1.
func markerInView(marks []fusion.Landmark, cam estimator.Pose) int {
	best, bestR := -1, 5.0
	for i, m := range marks {
		dx, dy := m.XM-cam.X, m.YM-cam.Y
		r := math.Hypot(dx, dy)
		if b := estimator.Wrap(math.Atan2(dy, dx) - cam.Heading); r < bestR && math.Abs(b) < 1 {
			best, bestR = i, r
		}
	}
	return best
}

// MarkerOffset returns how far marker id stands off its mapped position
// in this run (Errors.LandmarkSurveyM), in the simulator's frame, once the
// camera has seen it; ok is false before.
func (sm *Sim) MarkerOffset(id string) (dx, dy float64, ok bool) {
	off, ok := sm.survey[id]
	return off[0], off[1], ok
}

func (sm *Sim) emitCamera(t int64) {
	lat := sm.s.LatencyMinS + sm.rng.Float64()*(sm.s.LatencyMaxS-sm.s.LatencyMinS)
	in := Input{ArrivalNs: t + int64(lat*1e9), Truth: sm.s.ToField(sm.truth), Bumped: sm.bumped}
	cam := estimator.Compose(sm.truth, CameraMount())
	outlier := !sm.s.NoiseFree && sm.rng.Float64() < sm.s.OutlierFraction
	sm.errs.startFix(&sm.s, t)
	if sm.s.Markers {
		marks := sm.s.localMarkers()
		best := markerInView(marks, cam)
		if best < 0 {
			return
		}
		m := marks[best]
		m.XM, m.YM = sm.surveyed(best, m)
		r := math.Hypot(m.XM-cam.X, m.YM-cam.Y) + sm.camNoise(0, rangeStdM)
		b := estimator.Wrap(math.Atan2(m.YM-cam.Y, m.XM-cam.X) - cam.Heading + sm.camNoise(1, bearingStdRad))
		if outlier {
			r += 1 + 2*sm.rng.Float64()
		}
		in.Fix = &fusion.Fix{StampNs: t, SensorID: "camera", Kind: fusion.FixLandmark, LandmarkID: m.ID,
			RangeM: &r, BearingRad: &b, Cov: []float64{rangeStdM * rangeStdM, 0, 0, bearingStdRad * bearingStdRad}}
	} else {
		x, y, h := cam.X+sm.camNoise(0, cameraStdM), cam.Y+sm.camNoise(1, cameraStdM), cam.Heading+sm.camNoise(2, sm.s.Heading.CameraStdRad)
		if outlier {
			a := sm.rng.Float64() * 2 * math.Pi
			d := 1 + 2*sm.rng.Float64()
			x, y, h = x+d*math.Cos(a), y+d*math.Sin(a), h+sm.rng.Float64()*2-1
		}
		// The error is drawn in the simulator's frame and moved with the
		// pose, so that a twin run in a moved field frame sees the same error.
		p := sm.s.ToField(estimator.Pose{X: x, Y: y, Heading: estimator.Wrap(h)})
		in.Fix = &fusion.Fix{StampNs: t, SensorID: "camera", Kind: fusion.FixPose, XM: p.X, YM: p.Y, HeadingRad: p.Heading,
			Cov: []float64{cameraStdM * cameraStdM, 0, 0, 0, cameraStdM * cameraStdM, 0, 0, 0, sm.s.Heading.CameraStdRad * sm.s.Heading.CameraStdRad}}
		if sm.s.NamePoseMarkers {
			marks := sm.s.localMarkers()
			if best := markerInView(marks, cam); best >= 0 {
				in.Fix.Marker = marks[best].ID
			}
		}
	}
	in.Outlier = outlier
	switch {
	case sm.s.CameraStampAtArrival:
		in.Fix.StampNs = in.ArrivalNs
	case sm.s.CameraStampLateNs != 0:
		in.Fix.StampNs = t + sm.s.CameraStampLateNs
		in.ArrivalNs = max(in.ArrivalNs, in.Fix.StampNs)
	}
	if sm.s.SensorCovariance {
		in.Fix.Cov = nil
	}
	sm.push(in)
}

func (sm *Sim) push(in Input) {
	sm.seq++
	heap.Push(&sm.queue, item{in, sm.seq})
}

type item struct {
	Input
	seq int64
}

// queue orders inputs by arrival, then by generation order.
type queue []item

func (q queue) Len() int { return len(q) }
func (q queue) Less(i, j int) bool {
	if q[i].ArrivalNs != q[j].ArrivalNs {
		return q[i].ArrivalNs < q[j].ArrivalNs
	}
	return q[i].seq < q[j].seq
}
func (q queue) Swap(i, j int) { q[i], q[j] = q[j], q[i] }
func (q *queue) Push(x any)   { *q = append(*q, x.(item)) }
func (q *queue) Pop() any {
	old := *q
	it := old[len(old)-1]
	*q = old[:len(old)-1]
	return it
}

// Feed passes an input to the robot and returns its result.
func Feed(r *fusion.Robot, in *Input) fusion.Result {
	switch {
	case in.Odometry != nil:
		return r.AddOdometry(*in.Odometry)
	case in.Heading != nil:
		return r.AddHeading(*in.Heading)
	default:
		return r.AddFix(*in.Fix)
	}
}
