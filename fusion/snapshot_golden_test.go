package fusion_test

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

var rewriteSnapshot = flag.Bool("rewrite-snapshot", false, "rewrite the golden snapshot of this snapshot version in testdata/snapshots")

// goldenSnapshotPath is the golden snapshot of the current version. A new
// version needs a new file: the test fails until one is written.
func goldenSnapshotPath() string {
	return filepath.Join("..", "testdata", "snapshots", fmt.Sprintf("greenhouse-v%d.bin", fusion.SnapshotVersion))
}

// goldenRobot runs the greenhouse cart for three seconds (free wheels, IMU,
// encoder counts, camera outliers, pose fixes naming a marker a second, a
// push by hand at 2 s) with a 0.2 s
// window, odometry scale and rate-bias states and a camera whose errors are
// half correlated and Huber-weighted (so the estimate has 10 states), and
// returns its configuration and the robot.
// testdata/README.md describes the file made from it; server/convert's
// test builds the same robot.
func goldenRobot() (fusion.Config, *fusion.Robot) {
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 8, DurationS: 3,
		OutlierFraction: 0.2, Bump: &fusiontest.Bump{AtS: 2, DXM: 1}}
	sim := fusiontest.New(sc)
	cfg := sim.Config()
	cfg.WindowNs = 200e6
	cfg.Calibration = fusion.Calibration{Scale: true, RateBias: true}
	cfg.Sensors[0].CorrelationTimeS, cfg.Sensors[0].CorrelatedFraction, cfg.Sensors[0].Robust = 1.5, 0.5, fusion.RobustHuber
	r, err := fusion.New(cfg)
	if err != nil {
		panic(err)
	}
	for in, ok := sim.Next(); ok; in, ok = sim.Next() {
		// Its camera names a marker a second (version 15): the bump at 2
		// s leaves candidates of one marker waiting for another.
		nameMarker(&in, 1e9)
		fusiontest.Feed(r, &in)
	}
	return cfg, r
}

// TestSnapshotGolden: the golden snapshot of this version restores, and the
// restored robot writes the very same bytes. A change of the layout (a field
// added, renumbered or retyped) changes them, so the test fails until
// SnapshotVersion is bumped and a golden file written for the new version
// with -rewrite-snapshot.
func TestSnapshotGolden(t *testing.T) {
	cfg, r := goldenRobot()
	path := goldenSnapshotPath()
	if *rewriteSnapshot {
		b, err := r.Snapshot()
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	golden, err := os.ReadFile(path)
	if err != nil {
		t.Fatalf("no golden snapshot for version %d (write one with -rewrite-snapshot): %v", fusion.SnapshotVersion, err)
	}
	restored, err := fusion.RestoreSnapshot(cfg, golden)
	if err != nil {
		t.Fatalf("golden snapshot of version %d does not restore: %v", fusion.SnapshotVersion, err)
	}
	again, err := restored.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(again, golden) {
		t.Fatalf("the snapshot layout changed without a version bump: %s restores and writes %d bytes, not the same %d; "+
			"bump fusion.SnapshotVersion and write a golden file for it with -rewrite-snapshot", path, len(again), len(golden))
	}
	st := restored.Stats()
	if st.WindowEntries == 0 || len(st.Sensors) < 2 || restored.Sequence() == 0 {
		t.Errorf("golden snapshot holds too little to test the layout: %+v", st)
	}
}

// TestSnapshotErrors: damaged bytes, another version and another
// configuration are ErrSnapshot.
func TestSnapshotErrors(t *testing.T) {
	cfg, r := goldenRobot()
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	other := cfg
	other.IMU = fusion.IMUNone
	cases := []struct {
		name string
		cfg  fusion.Config
		b    []byte
	}{
		{"truncated", cfg, b[:len(b)/2]},
		{"another version", cfg, append([]byte{0x08, fusion.SnapshotVersion + 1}, b[2:]...)},
		{"empty", cfg, nil},
		{"another state size", other, b},
	}
	for _, c := range cases {
		if _, err := fusion.RestoreSnapshot(c.cfg, c.b); !errors.Is(err, fusion.ErrSnapshot) {
			t.Errorf("%s: %v, want ErrSnapshot", c.name, err)
		}
	}
}

// TestOlderSnapshotsRestore: the golden snapshot of every version this
// build reads (5 to SnapshotVersion) restores with the golden robot's
// configuration, and the restored robot takes more of the greenhouse run
// (its first fix after the restore included).
func TestOlderSnapshotsRestore(t *testing.T) {
	cfg, _ := goldenRobot()
	sc := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 8, DurationS: 4,
		OutlierFraction: 0.2, Bump: &fusiontest.Bump{AtS: 2, DXM: 1}}
	_, ins := collect(sc)
	for v := 5; v <= fusion.SnapshotVersion; v++ {
		b, err := os.ReadFile(filepath.Join("..", "testdata", "snapshots", fmt.Sprintf("greenhouse-v%d.bin", v)))
		if err != nil {
			t.Fatalf("version %d: %v", v, err)
		}
		r, err := fusion.RestoreSnapshot(cfg, b)
		if err != nil {
			t.Fatalf("version %d does not restore: %v", v, err)
		}
		fixes, from := 0, r.NewestNs()
		for i := range ins {
			if ins[i].StampNs() <= from {
				continue
			}
			res := fusiontest.Feed(r, &ins[i])
			if ins[i].Fix != nil && res.Verdict != fusion.VerdictInvalid {
				fixes++
			}
		}
		if p := r.Pose(); fixes == 0 || p.StampNs <= 3e9 {
			t.Errorf("version %d: restored robot took %d fixes, ends at %d ns", v, fixes, p.StampNs)
		}
	}
}

// TestSnapshotKeepsSensorRobust: a sensor record carries its sensor's
// robust weighting (by which Consistency judges a Student-t sensor), and
// a snapshot keeps it; a version 13 snapshot, which lacks it, restores with
// the configuration's (the golden robot's camera is Huber-weighted, with the
// default k).
func TestSnapshotKeepsSensorRobust(t *testing.T) {
	cfg, _ := goldenRobot()
	st := cfg
	st.Sensors = append([]fusion.Sensor(nil), cfg.Sensors...)
	st.Sensors[0].Robust, st.Sensors[0].RobustParameter = fusion.RobustStudentT, 6
	r, err := fusion.New(st)
	if err != nil {
		t.Fatal(err)
	}
	sim := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 8, DurationS: 3})
	for in, ok := sim.Next(); ok; in, ok = sim.Next() {
		fusiontest.Feed(r, &in)
	}
	b, err := r.Snapshot()
	if err != nil {
		t.Fatal(err)
	}
	restored, err := fusion.RestoreSnapshot(st, b)
	if err != nil {
		t.Fatal(err)
	}
	want := map[string]fusion.RobustLoss{st.Sensors[0].ID: fusion.RobustStudentT, "imu": fusion.RobustNone}
	for name, rr := range map[string]*fusion.Robot{"running": r, "restored": restored} {
		got := rr.Stats().Sensors
		if len(got) != len(want) {
			t.Fatalf("%s: %d sensor records, want %d", name, len(got), len(want))
		}
		for _, s := range got {
			if s.Robust != want[s.ID] || (s.Robust == fusion.RobustStudentT) != (s.RobustParameter == 6) {
				t.Errorf("%s: sensor %q: robust %v parameter %v, want %v", name, s.ID, s.Robust, s.RobustParameter, want[s.ID])
			}
		}
	}
	old, err := os.ReadFile(filepath.Join("..", "testdata", "snapshots", "greenhouse-v13.bin"))
	if err != nil {
		t.Fatal(err)
	}
	r13, err := fusion.RestoreSnapshot(cfg, old)
	if err != nil {
		t.Fatalf("version 13: %v", err)
	}
	for _, s := range r13.Stats().Sensors {
		w, k := fusion.RobustNone, 0.0
		if s.ID == cfg.Sensors[0].ID {
			w, k = fusion.RobustHuber, fusion.DefaultHuberK
		}
		if s.Robust != w || s.RobustParameter != k {
			t.Errorf("version 13: sensor %q: robust %v parameter %v, want the configuration's %v %v", s.ID, s.Robust, s.RobustParameter, w, k)
		}
	}
}

// TestSnapshotMomentsMatchVersion: the count of an estimate's
// errors-in-variables moments is its snapshot version's, 16 from version
// 18 and 9 before (testdata/README.md; the protocol buffer layout,
// proto/reckon/v1/journal.proto): the golden snapshot of version 17
// relabelled 18, and that of 18 relabelled 17, are refused with
// ErrSnapshot naming the count. Without the check the first restored with
// its pose block's moments read as if they covered the IMU offset too, and
// the second its 16 as a version 17's.
func TestSnapshotMomentsMatchVersion(t *testing.T) {
	cfg, _ := goldenRobot()
	for _, c := range []struct{ from, to byte }{{17, 18}, {18, 17}} {
		b, err := os.ReadFile(filepath.Join("..", "testdata", "snapshots", fmt.Sprintf("greenhouse-v%d.bin", c.from)))
		if err != nil {
			t.Fatal(err)
		}
		// Field 1, the version, is the first: tag 0x08 and a one-byte varint.
		if b[0] != 0x08 || b[1] != c.from {
			t.Fatalf("version %d: starts % x, not its version", c.from, b[:2])
		}
		if _, err := fusion.RestoreSnapshot(cfg, b); err != nil {
			t.Fatalf("version %d as it is: %v", c.from, err)
		}
		b = append([]byte{0x08, c.to}, b[2:]...)
		_, err = fusion.RestoreSnapshot(cfg, b)
		if !errors.Is(err, fusion.ErrSnapshot) || !strings.Contains(err.Error(), "errors-in-variables moments") {
			t.Errorf("version %d relabelled %d: %v, want ErrSnapshot naming the moments", c.from, c.to, err)
		}
	}
}
