package fusion_test

import (
	"reflect"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// TestSnapshotContinuesExactly: a robot restored from a snapshot taken in
// the middle of a run gives bit for bit the same results as the original
// for the rest of the run, also with every option on (the fourth case:
// 9 states and robust, correlated landmark fixes) and with landmark blocks
// (the sixth and seventh: three blocks, and one that the markers take in
// turns), with pose fixes naming their markers, moved by hand (the
// eighth), and with a landmark camera whose correlated errors are per
// landmark, moved by hand (the last: landmark fixes folded out of the
// window weigh later ones, markcorr.go, and candidates wait).
func TestSnapshotContinuesExactly(t *testing.T) {
	for k, sc := range []fusiontest.Scenario{
		{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 51, DurationS: 40, OutlierFraction: 0.1, Bump: &fusiontest.Bump{AtS: 25, DXM: 1}},
		{Layout: fusiontest.GyroTurn, Seed: 52, DurationS: 20, Counts: true},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, Markers: true, Seed: 53, DurationS: 20},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, Markers: true, Seed: 54, DurationS: 20, OutlierFraction: 0.1},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, Markers: true, Seed: 57, DurationS: 20, LatencyMinS: 0.02, LatencyMaxS: 0.4},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 55, DurationS: 20, LatencyMinS: 0.15, LatencyMaxS: 0.15, Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 56, DurationS: 20, LatencyMinS: 0.15, LatencyMaxS: 0.15, Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}},
		{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 58, DurationS: 20, LatencyMinS: 0.02, LatencyMaxS: 0.2, Bump: &fusiontest.Bump{AtS: 11.5, DXM: 1, DRad: 0.3}},
		{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 29, DurationS: 30, LatencyMinS: 0.15, LatencyMaxS: 0.15,
			Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}},
	} {
		_, ins := collect(sc)
		if k == 7 {
			// Pose fixes name a marker every 2 s: the snapshot at 12 s
			// holds one marker's candidates waiting for the next.
			nameMarkers(ins, 2e9)
		}
		cfg := fusiontest.New(sc).Config()
		switch k {
		case 3, 4: // the second with fixes arriving out of order
			cfg = allOptions(cfg)
		case 5, 6: // three landmark blocks, and one
			cfg = surveyed(cfg, k == 6)
		case 8: // per-landmark correlated errors, moved by hand
			cfg = perLandmarkCamera(cfg, false)
		}
		a, _ := fusion.New(cfg)
		mid := len(ins) * 3 / 5
		for i := 0; i < mid; i++ {
			fusiontest.Feed(a, &ins[i])
		}
		snap, b := snapshotRestored(t, a, cfg)
		if !reflect.DeepEqual(a.Stats(), b.Stats()) || a.Pose() != b.Pose() {
			t.Fatalf("%v: restored robot differs at once", sc.Layout)
		}
		for i := mid; i < len(ins); i++ {
			ra, rb := fusiontest.Feed(a, &ins[i]), fusiontest.Feed(b, &ins[i])
			if !reflect.DeepEqual(ra, rb) || a.Pose() != b.Pose() {
				t.Fatalf("%v: input %d: %+v vs %+v", sc.Layout, i, ra, rb)
			}
		}
		if !reflect.DeepEqual(a.Stats(), b.Stats()) {
			t.Errorf("%v: statistics differ at the end", sc.Layout)
		}
		t.Logf("%v: snapshot of %d bytes", sc.Layout, len(snap))
	}
}

// TestSnapshotWithHeldFix: a snapshot taken while a fix waits for odometry
// (held, so without a checkpoint yet) restores, and the restored robot
// decides the held fix exactly as the original does. Regression: such a
// snapshot was refused as "a checkpoint of 0 states".
func TestSnapshotWithHeldFix(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 11, DurationS: 3, OutlierFraction: 0.1}
	_, ins := collect(sc)
	cfg := fusiontest.New(sc).Config()
	a, _ := fusion.New(cfg)
	var snap []byte
	i := 0
	for ; i < len(ins) && snap == nil; i++ {
		if res := fusiontest.Feed(a, &ins[i]); res.Verdict == fusion.VerdictHeld {
			b, err := a.Snapshot()
			if err != nil {
				t.Fatal(err)
			}
			snap = b
		}
	}
	if snap == nil {
		t.Fatal("no fix was held in the scenario")
	}
	b, err := fusion.RestoreSnapshot(cfg, snap)
	if err != nil {
		t.Fatal(err)
	}
	for ; i < len(ins); i++ {
		ra, rb := fusiontest.Feed(a, &ins[i]), fusiontest.Feed(b, &ins[i])
		if !reflect.DeepEqual(ra, rb) || a.Pose() != b.Pose() {
			t.Fatalf("input %d: %+v vs %+v", i, ra, rb)
		}
	}
}

// snapshotRestored returns a's snapshot and the robot restored from it
// with configuration cfg.
func snapshotRestored(t *testing.T, a *fusion.Robot, cfg fusion.Config) ([]byte, *fusion.Robot) {
	t.Helper()
	snap, err := a.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	b, err := fusion.RestoreSnapshot(cfg, snap)
	if err != nil {
		t.Fatal(err)
	}
	return snap, b
}
