package fusion_test

import (
	"errors"
	"os"
	"path/filepath"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// FuzzRestoreSnapshot: any bytes restore as a robot or are refused with
// ErrSnapshot, never a panic, and a restored robot takes the rest of its
// run, late fixes and their replays included, without panicking. Seeds:
// the golden snapshots of every version and a snapshot of a robot with
// landmark blocks and a mount block, whose fixes name those states.
func FuzzRestoreSnapshot(f *testing.F) {
	cfg, r := goldenRobot()
	b, err := r.Snapshot()
	if err != nil {
		f.Fatal(err)
	}
	f.Add(b, false)
	paths, _ := filepath.Glob(filepath.Join("..", "testdata", "snapshots", "greenhouse-v*.bin"))
	for _, p := range paths {
		if g, err := os.ReadFile(p); err == nil {
			f.Add(g, false)
		}
	}
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 9, DurationS: 4, LatencyMinS: 0.05, LatencyMaxS: 0.3,
		Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}
	lcfg := fusiontest.New(sc).Config()
	lcfg.LandmarkPositionStdM = 0.03
	lcfg.Sensors = append([]fusion.Sensor(nil), lcfg.Sensors...)
	lcfg.Sensors[0].MountStd = [3]float64{0.01, 0.01, 0.01}
	_, ins := collect(sc)
	lr, err := fusion.New(lcfg)
	if err != nil {
		f.Fatal(err)
	}
	for i := range ins[:len(ins)/2] {
		fusiontest.Feed(lr, &ins[i])
	}
	lb, err := lr.Snapshot()
	if err != nil {
		f.Fatal(err)
	}
	f.Add(lb, true)
	rest := ins[len(ins)/2:]
	f.Fuzz(func(t *testing.T, b []byte, landmarks bool) {
		c := cfg
		if landmarks {
			c = lcfg
		}
		r, err := fusion.RestoreSnapshot(c, b)
		if err != nil {
			if !errors.Is(err, fusion.ErrSnapshot) {
				t.Fatalf("refused without ErrSnapshot: %v", err)
			}
			return
		}
		if landmarks {
			for i := range rest {
				fusiontest.Feed(r, &rest[i])
			}
		}
	})
}
