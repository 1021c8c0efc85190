package export

import (
	"context"
	"os"
	"testing"

	"reckon.example/fusion/fusiontest"
)

// hourRun is an hour of the greenhouse cart at the simulator's default
// rates (200 Hz odometry, 100 Hz IMU, 10 Hz camera): about 1.1 million
// inputs.
var hourRun = fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 60, DurationS: 3600, OutlierFraction: 0.02}

// TestWriteHourJournal writes the journal of an hour's run into the
// directory RECKON_HOUR_JOURNAL, for measuring an export with /usr/bin/time
// (README, "Fleet questions with DuckDB"); without it the test skips.
func TestWriteHourJournal(t *testing.T) {
	dir := os.Getenv("RECKON_HOUR_JOURNAL")
	if dir == "" {
		t.Skip("set RECKON_HOUR_JOURNAL to a directory to write an hour's journal into")
	}
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := writeJournal(t, dir, "cart-1", hourRun, lagOdometry{}).Close(); err != nil {
		t.Fatal(err)
	}
}

// BenchmarkExport exports a minute of one cart; inputs/s is the rate of
// the whole export (replay, rows, Parquet encoding and compression).
func BenchmarkExport(b *testing.B) {
	sc := hourRun
	sc.DurationS = 60
	dir := b.TempDir()
	if err := writeJournal(b, dir, "cart-1", sc, lagOdometry{}).Close(); err != nil {
		b.Fatal(err)
	}
	out := b.TempDir()
	b.ReportAllocs()
	var inputs int64
	for b.Loop() {
		rows, err := Export(context.Background(), dir, out, Options{})
		if err != nil {
			b.Fatal(err)
		}
		inputs += rows[0].Inputs
	}
	b.ReportMetric(float64(inputs)/b.Elapsed().Seconds(), "inputs/s")
}
