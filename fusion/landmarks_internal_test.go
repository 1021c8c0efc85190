package fusion

import (
	"errors"
	"math"
	"testing"
)

// surveyConfig is a cart standing at the origin with a landmark camera
// and three markers surveyed to 3 cm; calibration adds the odometry
// scales, the rate bias and the camera's bias block, which leave room for
// one landmark block.
func surveyConfig(calibration bool) Config {
	cfg := Config{
		Wheels:               []Wheel{{Name: "left", YM: 0.2, CountsPerM: 5000}, {Name: "right", YM: -0.2, CountsPerM: 5000}},
		NoSideSlip:           true,
		IMU:                  IMUAbsolute,
		Landmarks:            []Landmark{{ID: "a", XM: 3}, {ID: "b", YM: 3}, {ID: "c", XM: -3, PositionStdM: 0.1}},
		Sensors:              []Sensor{{ID: "cam", Kind: FixLandmark, Cov: []float64{4e-4, 0, 0, 1e-4}}},
		LandmarkPositionStdM: 0.03,
	}
	if calibration {
		cfg.Calibration = Calibration{Scale: true, RateBias: true}
		cfg.Sensors[0].CorrelationTimeS, cfg.Sensors[0].CorrelatedFraction = 1, 0.5
	}
	return cfg
}

// TestLandmarkBlockLayout: the landmark blocks take what room the state
// leaves, at most three; a map with survey error and no room is a
// configuration error naming the field; an exact map, or no landmark
// sensor, takes none.
func TestLandmarkBlockLayout(t *testing.T) {
	for _, c := range []struct {
		cfg       Config
		blocks, n int
	}{
		// The pose and the IMU offset, then three blocks.
		{surveyConfig(false), 3, 10},
		// The pose, the IMU offset, two scales, the rate bias and the
		// camera's bias block (9), then one block.
		{surveyConfig(true), 1, 11},
		{func() Config {
			c := surveyConfig(false)
			c.LandmarkPositionStdM = 0
			c.Landmarks[2].PositionStdM = 0
			return c
		}(), 0, 4},
		{func() Config {
			c := surveyConfig(false)
			c.Sensors[0].Kind = FixPosition
			c.Sensors[0].Cov = []float64{1e-4, 0, 0, 1e-4}
			return c
		}(), 0, 4},
	} {
		r, err := New(c.cfg)
		if err != nil {
			t.Fatal(err)
		}
		if len(r.lmAt) != c.blocks || r.n != c.n {
			t.Errorf("%d landmark blocks in %d states, want %d in %d", len(r.lmAt), r.n, c.blocks, c.n)
		}
	}
	full := surveyConfig(true)
	full.Sensors[0].MountStd = [3]float64{0.01, 0.01, 0.01}
	var fe *FieldError
	if _, err := New(full); !errors.As(err, &fe) || fe.Path != "landmark_position_std_m" {
		t.Errorf("no room for a landmark block: %v, want an error naming landmark_position_std_m", err)
	}
	bad := surveyConfig(false)
	bad.Landmarks[0].PositionStdM = math.NaN()
	if _, err := New(bad); !errors.As(err, &fe) || fe.Path != "landmarks[0].position_std_m" {
		t.Errorf("NaN survey error: %v", err)
	}
}

// TestSnapshotKeepsMeasurementBlocks: a fix's mount and landmark error
// states survive a snapshot, so that a late fix inserted before it after a
// restore replays it as the robot that wrote the snapshot does. Regression:
// snapshots before version 10 dropped the mount error states, and the
// restored robot replayed such a fix without its sensor's mount block.
func TestSnapshotKeepsMeasurementBlocks(t *testing.T) {
	cfg := surveyConfig(false)
	cfg.Sensors[0].MountStd = [3]float64{0.01, 0.01, 0.01}
	cfg.Sensors[0].Mount.X = 0.1
	a, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	if len(a.lmAt) == 0 || a.sensorMount[0] == 0 {
		t.Fatalf("%d landmark blocks and mount block at %d: the test needs both", len(a.lmAt), a.sensorMount[0])
	}
	odo := func(r *Robot, until int64) {
		for ts := r.NewestNs() + 10e6; ts <= until; ts += 10e6 {
			if r.seq == 0 {
				ts = 0
			}
			r.AddOdometry(Odometry{StampNs: ts, Counts: []int64{0, 0}})
		}
	}
	fix := func(r *Robot, stamp int64, rg, br float64) Result {
		return r.AddFix(Fix{StampNs: stamp, SensorID: "cam", Kind: FixLandmark, LandmarkID: "a", RangeM: &rg, BearingRad: &br})
	}
	odo(a, 600e6)
	if res := fix(a, 500e6, 2.91, 0.01); res.Verdict != VerdictApplied {
		t.Fatalf("fix: %v %v", res.Verdict, res.Err)
	}
	snap, err := a.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	b, err := RestoreSnapshot(cfg, snap)
	if err != nil {
		t.Fatal(err)
	}
	ra, rb := fix(a, 300e6, 2.88, -0.01), fix(b, 300e6, 2.88, -0.01)
	if ra.Verdict != VerdictApplied || a.Pose() != b.Pose() {
		t.Errorf("after a late fix: %v %+v, restored %v %+v", ra.Verdict, a.Pose(), rb.Verdict, b.Pose())
	}
}

// TestLandmarkBlockAssignment: with one block, the first landmark of a
// frame takes it (seeded) and the second carries its survey error as white
// noise; the block stays with its landmark across frames while the
// landmark is seen, and goes to another once its landmark has not been
// seen for landmarkKeepNs. A landmark's own survey error replaces the
// map's (c's white variance).
func TestLandmarkBlockAssignment(t *testing.T) {
	r, err := New(surveyConfig(true))
	if err != nil {
		t.Fatal(err)
	}
	entryOf := func(seq uint64) *entry {
		for i := range r.live() {
			if e := &r.live()[i]; e.seq == seq {
				return e
			}
		}
		t.Fatalf("no entry of input %d", seq)
		return nil
	}
	next := int64(0)
	until := func(stamp int64) { // odometry up to stamp, standing still
		for ; next <= stamp; next += 10e6 {
			if res := r.AddOdometry(Odometry{StampNs: next, Counts: []int64{0, 0}}); res.Verdict != VerdictApplied {
				t.Fatalf("odometry at %d: %v %v", next, res.Verdict, res.Err)
			}
		}
	}
	fix := func(stamp int64, id string) *entry {
		var rg, br float64
		switch id {
		case "a":
			rg, br = 3, 0
		case "b":
			rg, br = 3, math.Pi/2
		case "c":
			rg, br = 3, math.Pi
		}
		until(stamp)
		res := r.AddFix(Fix{StampNs: stamp, SensorID: "cam", Kind: FixLandmark, LandmarkID: id, RangeM: &rg, BearingRad: &br})
		if res.Verdict != VerdictApplied {
			t.Fatalf("fix of %s at %d: %v %v", id, stamp, res.Verdict, res.Err)
		}
		return entryOf(res.Seq)
	}
	at := r.lmAt[0]
	sq := func(s float64) float64 { return s * s } // as the robot squares it
	check := func(e *entry, block, seeded bool, v float64) {
		t.Helper()
		if (e.meas.LandmarkError == at) != block || e.seeded != seeded || e.meas.LandmarkVar != v {
			t.Errorf("landmark %d at %d: block %d seeded %v white %v; want block %v seeded %v white %v",
				e.lm, e.t1, e.meas.LandmarkError, e.seeded, e.meas.LandmarkVar, block, seeded, v)
		}
	}
	check(fix(100e6, "a"), true, true, 0)
	check(fix(100e6, "b"), false, false, sq(0.03))
	check(fix(200e6, "a"), true, false, 0)
	check(fix(200e6, "b"), false, false, sq(0.03))
	check(fix(400e6, "c"), false, false, sq(0.1)) // a was seen 200 ms ago
	check(fix(600e6, "c"), true, true, 0)         // and 400 ms
	check(fix(650e6, "b"), false, false, sq(0.03))
	// A late fix of a, before c took the block, replays the window: the
	// block is a's again there and c's from 600 ms, as in stamp order.
	check(fix(300e6, "a"), true, false, 0)
	var seeded []int32
	for i := range r.live() {
		if e := &r.live()[i]; e.seeded {
			seeded = append(seeded, e.lm)
		}
	}
	if len(seeded) != 2 || seeded[0] != 1 || seeded[1] != 3 {
		t.Errorf("seeded by landmarks %v, want [1 3] (a, then c)", seeded)
	}
	// An outlier of b, 2 m long, when c's block is free to go (c last seen
	// at 600 ms): gated, it leaves the block c's and the estimate as it
	// was; the next good fix of b takes the block.
	until(1.2e9)
	before := r.f.State()
	table := r.lm
	rg, br := 5.0, math.Pi/2
	res := r.AddFix(Fix{StampNs: 1.2e9, SensorID: "cam", Kind: FixLandmark, LandmarkID: "b", RangeM: &rg, BearingRad: &br})
	if res.Verdict != VerdictGated {
		t.Fatalf("outlier of b: %v %v, want gated", res.Verdict, res.Err)
	}
	if e := entryOf(res.Seq); e.seeded || r.lm != table || r.f.State() != before {
		t.Errorf("a gated fix of b seeded a block (%v) or changed the table (%v, was %v) or the estimate", e.seeded, r.lm, table)
	}
	check(fix(1.25e9, "b"), true, true, 0)
}
