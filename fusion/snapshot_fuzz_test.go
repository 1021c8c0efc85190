package fusion_test

import (
	"errors"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
)

// FuzzRestoreSnapshot: any bytes restore as a robot or are refused with
// ErrSnapshot, never a panic, and a restored robot takes the next inputs
// of its run, late fixes and their replays included, without panicking.
// Seeds: snapshots of a robot with three landmark blocks and a mount
// block, and of one with the odometry scales, a rate bias, the camera's
// bias block and one landmark block, whose fixes name those states, each
// with a window short enough that a fuzzer mutates a few kilobytes
// (TestSnapshotGolden and TestSnapshotContinuesExactly restore full-size
// ones).
func FuzzRestoreSnapshot(f *testing.F) {
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 9, DurationS: 3, LatencyMinS: 0.05, LatencyMaxS: 0.3,
		Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}
	lcfg := fusiontest.New(sc).Config()
	lcfg.LandmarkPositionStdM = 0.03
	lcfg.WindowNs = 40e6
	lcfg.Sensors = append([]fusion.Sensor(nil), lcfg.Sensors...)
	lcfg.Sensors[0].MountStd = [3]float64{0.01, 0.01, 0.01}
	_, ins := collect(sc)
	mid := len(ins) * 2 / 3
	rest := ins[mid:min(mid+40, len(ins))]
	calib := surveyed(fusiontest.New(sc).Config(), true)
	calib.WindowNs = 40e6
	for _, c := range []fusion.Config{lcfg, calib} {
		r, err := fusion.New(c)
		if err != nil {
			f.Fatal(err)
		}
		for i := range ins[:mid] {
			fusiontest.Feed(r, &ins[i])
		}
		b, err := r.Snapshot()
		if err != nil {
			f.Fatal(err)
		}
		if _, err := fusion.RestoreSnapshot(c, b); err != nil {
			f.Fatalf("seed of %d bytes does not restore: %v", len(b), err)
		}
		f.Logf("seed of %d bytes", len(b))
		f.Add(b, c.Calibration.Scale)
	}
	f.Fuzz(func(t *testing.T, b []byte, calibration bool) {
		c := lcfg
		if calibration {
			c = calib
		}
		r, err := fusion.RestoreSnapshot(c, b)
		if err != nil {
			if !errors.Is(err, fusion.ErrSnapshot) {
				t.Fatalf("refused without ErrSnapshot: %v", err)
			}
			return
		}
		for i := range rest {
			fusiontest.Feed(r, &rest[i])
		}
	})
}
