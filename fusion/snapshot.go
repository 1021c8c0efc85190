package fusion

import (
	"bytes"
	"encoding/gob"
	"fmt"

	"reckon.example/estimator"
)

// The snapshot mirrors the robot's state with exported fields for gob.
type snapCheckpoint struct {
	Est         estimator.State
	OffsetReady bool
}

type snapEntry struct {
	Kind        uint8
	T0, T1      int64
	Seq         uint64
	Step        estimator.Step
	Cov         [9]float64
	Meas        estimator.Measurement
	IMU         bool
	Sensor      int
	Pose        estimator.Pose
	PoseCov     [9]float64
	After       snapCheckpoint
	Out         estimator.Outcome
	Initialised bool
}

type snapCandidate struct {
	Stamp         int64
	Implied, Corr estimator.Pose
	Cov           [9]float64
}

type snapState struct {
	Version        int
	Filter         estimator.State
	Ready, Started bool
	Base           snapCheckpoint
	BaseT, Newest  int64
	Ents, Held     []snapEntry
	LastCounts     []int64
	LastIMU        *float64
	Seq            uint64
	Odo, Meas      VerdictCounts
	Sensors        []SensorStats
	Slips, Gaps    uint64
	Recoveries     uint64
	Reasons        TrustReason
	RefusedRun     int
	Fault          bool
	Fixes, IMU     snapWindow
	Cands          []snapCandidate
}

// snapWindow is a trust window (nisWindow).
type snapWindow struct {
	NIS       []float64
	Dims      []int
	Pos, Fill int
	Raised    bool
}

func toSnapWindow(w *nisWindow) snapWindow { return snapWindow{w.nis, w.dims, w.pos, w.fill, w.raised} }

func fromSnapWindow(s *snapWindow, w *nisWindow) {
	if s.NIS != nil {
		w.nis, w.dims, w.pos, w.fill, w.raised = s.NIS, s.Dims, s.Pos, s.Fill, s.Raised
	}
}

// snapVersion 2: the trust state holds a window of fixes and one of IMU
// headings (version 1 had one window of both).
const snapVersion = 2

func toSnap(e *entry) snapEntry {
	return snapEntry{Kind: uint8(e.kind), T0: e.t0, T1: e.t1, Seq: e.seq, Step: e.step, Cov: e.cov, Meas: e.meas, IMU: e.imu, Sensor: e.sensor,
		Pose: e.pose, PoseCov: e.poseCov, After: snapCheckpoint{e.after.est, e.after.offsetReady}, Out: e.out, Initialised: e.initialised}
}

func fromSnap(s *snapEntry) entry {
	return entry{kind: entryKind(s.Kind), t0: s.T0, t1: s.T1, seq: s.Seq, step: s.Step, cov: s.Cov, meas: s.Meas, imu: s.IMU, sensor: s.Sensor,
		pose: s.Pose, poseCov: s.PoseCov, after: checkpoint{s.After.Est, s.After.OffsetReady}, out: s.Out, initialised: s.Initialised}
}

// Snapshot returns the robot's complete state as bytes. RestoreSnapshot
// with the same configuration gives a robot that goes on exactly as this one
// would, bit for bit: the service writes snapshots into the journal so that
// a restart replays only what came after the last one.
func (r *Robot) Snapshot() ([]byte, error) {
	s := snapState{Version: snapVersion, Filter: r.f.State(), Ready: r.ready, Started: r.started,
		Base: snapCheckpoint{r.base.est, r.base.offsetReady}, BaseT: r.baseT, Newest: r.newest,
		LastCounts: r.lastCounts, LastIMU: r.lastIMU, Seq: r.seq,
		Odo: r.stats.odo, Meas: r.stats.meas, Sensors: r.stats.sensors, Slips: r.stats.slips, Gaps: r.stats.gaps, Recoveries: r.stats.recoveries,
		Reasons: r.trust.reasons, RefusedRun: r.trust.refusedRun, Fault: r.trust.fault, Fixes: toSnapWindow(&r.trust.fixes), IMU: toSnapWindow(&r.trust.imu)}
	for i := range r.live() {
		s.Ents = append(s.Ents, toSnap(&r.live()[i]))
	}
	for i := range r.held {
		s.Held = append(s.Held, toSnap(&r.held[i]))
	}
	for _, c := range r.cands {
		s.Cands = append(s.Cands, snapCandidate{c.stamp, c.implied, c.corr, c.cov})
	}
	var buf bytes.Buffer
	if err := gob.NewEncoder(&buf).Encode(&s); err != nil {
		return nil, err
	}
	return buf.Bytes(), nil
}

// RestoreSnapshot makes a robot from cfg and a snapshot that a robot of the
// same configuration took.
func RestoreSnapshot(cfg Config, b []byte) (*Robot, error) {
	r, err := New(cfg)
	if err != nil {
		return nil, err
	}
	var s snapState
	if err := gob.NewDecoder(bytes.NewReader(b)).Decode(&s); err != nil {
		return nil, fmt.Errorf("%w: snapshot: %v", ErrBadSample, err)
	}
	if s.Version != snapVersion {
		return nil, fmt.Errorf("%w: snapshot version %d, this build reads %d", ErrBadSample, s.Version, snapVersion)
	}
	if s.Filter.N != r.n {
		return nil, fmt.Errorf("%w: snapshot of a %d-state robot for a %d-state configuration", ErrBadSample, s.Filter.N, r.n)
	}
	r.f.SetState(&s.Filter)
	r.ready, r.started = s.Ready, s.Started
	r.base, r.baseT, r.newest = checkpoint{s.Base.Est, s.Base.OffsetReady}, s.BaseT, s.Newest
	for i := range s.Ents {
		r.ents = append(r.ents, fromSnap(&s.Ents[i]))
	}
	for i := range s.Held {
		r.held = append(r.held, fromSnap(&s.Held[i]))
	}
	r.lastCounts, r.lastIMU, r.seq = s.LastCounts, s.LastIMU, s.Seq
	r.stats.odo, r.stats.meas, r.stats.slips, r.stats.gaps, r.stats.recoveries = s.Odo, s.Meas, s.Slips, s.Gaps, s.Recoveries
	for _, ss := range s.Sensors {
		r.stats.sensor(ss.ID, ss.GateProbability)
	}
	copy(r.stats.sensors, s.Sensors)
	r.trust.reasons, r.trust.refusedRun, r.trust.fault = s.Reasons, s.RefusedRun, s.Fault
	fromSnapWindow(&s.Fixes, &r.trust.fixes)
	fromSnapWindow(&s.IMU, &r.trust.imu)
	for _, c := range s.Cands {
		r.cands = append(r.cands, candidate{c.Stamp, c.Implied, c.Corr, c.Cov})
	}
	return r, nil
}
