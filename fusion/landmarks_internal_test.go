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
