package fusion

import (
	"errors"

	"reckon.example/estimator"
)

// Odometry is one odometry sample. Exactly one of TravelM, Counts and Step
// is set.
type Odometry struct {
	// StampNs is when the wheels were read: the end of the interval.
	StampNs int64
	// StartNs is the start of the interval for TravelM and Step; an interval
	// that does not start where the previous one ended is a gap.
	StartNs int64
	// TravelM is each wheel's travel over [StartNs, StampNs] in metres, in
	// the order of Config.Wheels.
	TravelM []float64
	// Counts is each wheel's cumulative count at StampNs. The first sample
	// sets the reference; a lost sample loses nothing.
	Counts []int64
	// Step is a body step the robot computed itself over the interval.
	Step *estimator.Step
	// IMUHeadingRad is the IMU's heading at StampNs, if read with the
	// wheels: an absolute heading update in IMUAbsolute mode, the source of
	// the turn row in IMURotation mode (where a Step without it leaves the
	// next wheel sample no heading to turn from: that sample is the
	// reference, its interval a gap).
	IMUHeadingRad *float64
}

// InputKind names the kinds of input a Robot takes.
type InputKind uint8

const (
	// InputOdometry: an Odometry sample (AddOdometry).
	InputOdometry InputKind = iota + 1
	// InputHeading: an IMU Heading sample (AddHeading).
	InputHeading
	// InputFix: an absolute Fix (AddFix).
	InputFix
	// InputReseed: a pose given by hand (Reseed).
	InputReseed
	// InputRunStart: the start of a new run (StartRun).
	InputRunStart
)

// Heading is one IMU heading sample (IMUAbsolute mode).
type Heading struct {
	StampNs    int64
	HeadingRad float64
	// VarRad2 is the reading's variance; 0 takes Noise.IMUHeadingVarRad2.
	VarRad2 float64
}

// FixKind says what a Fix measures.
type FixKind uint8

const (
	// FixPose: the sensor's field pose XM, YM, HeadingRad; Cov is 3x3.
	FixPose FixKind = iota + 1
	// FixPosition: the mounted point's field position XM, YM; Cov is 2x2.
	FixPosition
	// FixHeading: the sensor's field heading HeadingRad; Cov is 1x1.
	FixHeading
	// FixLandmark: range and/or bearing from the sensor to a mapped
	// landmark; Cov is 2x2 for both, 1x1 for one.
	FixLandmark
)

// Fix is one absolute fix, typically from a camera seeing a marker.
type Fix struct {
	// StampNs is the sensor's stamp on the robot's time base: the capture
	// time plus the sensor's configured latency_ns.
	StampNs int64
	// SensorID names one of the robot's configured sensors (Config.Sensors);
	// a fix naming none is refused with ErrUnknownSensor.
	SensorID string
	Kind     FixKind
	// Mount is the sensor's pose in the body frame; nil takes the
	// sensor's configured mount.
	Mount *estimator.Pose
	// XM, YM, HeadingRad are the measured field pose, position or heading.
	XM, YM, HeadingRad float64
	// Marker names the marker (or rigid board of markers) a pose fix was
	// computed from, the same name on every frame; empty is unknown, and
	// other kinds of fix name none. Move recovery counts markers by it
	// (Recovery.DistinctMarkers).
	Marker string
	// LandmarkID, RangeM, BearingRad are the landmark fix: at least one of
	// range and bearing (radians from the sensor's +x, counter-clockwise).
	LandmarkID string
	RangeM     *float64
	BearingRad *float64
	// Cov is the row-major covariance in the order above; empty takes the
	// sensor's configured covariance (the matching entries for a range-only
	// or bearing-only landmark fix).
	Cov []float64
}

// Verdict says what became of an input.
type Verdict uint8

const (
	// VerdictApplied: the input is in the estimate.
	VerdictApplied Verdict = iota + 1
	// VerdictHeld: stamped after the newest odometry; it waits, and a later
	// Result reports it in Resolved.
	VerdictHeld
	// VerdictGated: a fix whose NIS exceeded its gate; nothing changed.
	VerdictGated
	// VerdictTooOld: stamped before the history window; nothing changed.
	VerdictTooOld
	// VerdictInvalid: a bad value; nothing changed; Err says what.
	VerdictInvalid
)

// Errors that Results carry; test them with errors.Is.
var (
	ErrTooOld          = errors.New("stamped before the history window")
	ErrTimeBackwards   = errors.New("time runs backwards")
	ErrTooFarAhead     = errors.New("stamped too far past the newest odometry")
	ErrHeldFull        = errors.New("too many samples already wait for odometry")
	ErrAbsurdJump      = errors.New("implausible motion")
	ErrBadSample       = errors.New("malformed sample")
	ErrRepeated        = errors.New("repeats an input already taken")
	ErrUnknownLandmark = errors.New("unknown landmark")
	ErrNoIMU           = errors.New("robot's imu_mode does not take this sample")
)

// Resolution is the final verdict of an input that was held.
type Resolution struct {
	Seq     uint64
	Verdict Verdict
	NIS     float64
	Err     error
}

// Result is what became of one input.
type Result struct {
	// Seq is the input's arrival sequence number on this robot, from 1;
	// 0 for an input refused by its checks (shape, finite values,
	// covariance, landmark, time running backwards), which is not taken.
	Seq     uint64
	Verdict Verdict
	// NIS and Dim are a fix's normalised innovation squared and dimension.
	NIS float64
	Dim int
	// Err says why an input was Invalid or TooOld.
	Err error
	// Resolved lists held inputs decided while processing this one.
	Resolved []Resolution
	// Events lists notable moments this input caused.
	Events []Event
}

// EventKind names a notable moment.
type EventKind uint8

// The event kinds; Event says what Value holds for each.
const (
	EventFixRefused EventKind = iota + 1
	EventSlipSuspected
	EventOdometryGap
	EventMoveRecovered
	EventTrustLost
	EventTrustRegained
	EventReseeded
	EventRunStarted
)

// Event is a notable moment: a fix refused (Value is its NIS), a suspected
// slip (Value is the residual chi-square), a gap in odometry (Value is its
// length in seconds), a move recovered (Value is the correction's length in
// metres), trust lost or regained (Detail lists the reasons), a reseed, a
// new run started (Value is its number, Detail names its boot; StampNs is
// 0, the new clock's stamps start with the inputs that follow).
type Event struct {
	Kind     EventKind
	StampNs  int64
	SensorID string
	Value    float64
	Detail   string
}
