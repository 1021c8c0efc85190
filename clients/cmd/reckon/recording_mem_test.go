package main

import (
	"context"
	"runtime"
	"testing"

	"reckon.example/fusion/fusiontest"
)

// TestReadRunMemory: tune and calibrate hold the run they fit in memory
// (calib replays it many times), so each input kept should cost little
// more than its own values: odometry's 80 bytes and counts, a heading's
// 24, a fix's 136 (unsafe.Sizeof), and the 24 bytes of its
// RecordedInput. Measured on a minute of the simulated cart at 200 Hz
// (about 18,000 inputs), the heap after readRun holds under 160 bytes an
// input (116 now). Before, each input kept a pointer into the whole
// decoded sample, 248 bytes whatever its kind, and the heap held about
// 308 bytes an input: 2.6 GB of memory for tune of a 3.3 h recording.
func TestReadRunMemory(t *testing.T) {
	dir := t.TempDir()
	cfgPath, samples, _ := writeRecording(t, dir, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 5, DurationS: 60, OdometryHz: 200, IMUHz: 100}, (*fusiontest.Sim).WhiteConfig)
	cp, _ := readConfigFile(t, cfgPath)
	var before, after runtime.MemStats
	runtime.GC()
	runtime.ReadMemStats(&before)
	rec, err := readRun(context.Background(), samples, "", cp, 1)
	if err != nil {
		t.Fatal(err)
	}
	runtime.GC()
	runtime.ReadMemStats(&after)
	n := len(rec.inputs)
	perInput := float64(int64(after.HeapAlloc)-int64(before.HeapAlloc)) / float64(n)
	runtime.KeepAlive(rec)
	t.Logf("%d inputs, %.0f bytes each", n, perInput)
	if n < 15000 || perInput > 160 {
		t.Errorf("%d inputs read, %.0f bytes of heap each; want at least 15000 and at most 160", n, perInput)
	}
}
