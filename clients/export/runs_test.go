package export

import (
	"context"
	"errors"
	"os"
	"strings"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// TestExportRunsOfARebootedJournal: a journal whose controller restarted
// mid-run exports as two runs: a runs row each (key, journal, number, boot
// id, counts and stamps of its own), and every input, pose and event row
// under its run's key, the run start the first of run 2.
func TestExportRunsOfARebootedJournal(t *testing.T) {
	dir := t.TempDir()
	sim := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 31, DurationS: 8})
	cfg := sim.Config()
	var ins []fusiontest.Input
	for in, ok := sim.Next(); ok; in, ok = sim.Next() {
		ins = append(ins, in)
	}
	mid := len(ins) / 2
	var samples []*pb.Sample
	for i := range ins[:mid] {
		samples = append(samples, toWire(&ins[i]))
	}
	samples = append(samples, &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: "boot-2"}}})
	after := fusiontest.Reboot(ins, mid)
	for i := range after {
		samples = append(samples, toWire(&after[i]))
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	j, err := journal.Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: convert.ConfigToProto(cfg)}, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	for k, s := range samples {
		resp, taken := convert.Take(fr, s, uint64(k+1))
		if !taken {
			t.Fatalf("sample %d refused: %s", k, resp.GetReason())
		}
		if err := j.AddPair(&pb.JournalInput{Sequence: resp.GetSequence(), Sample: s}, &pb.JournalOutput{Response: resp}); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := j.Flush(); err != nil {
		t.Fatal(err)
	}
	j.Close()

	out := t.TempDir()
	rows, err := Export(context.Background(), dir, out, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != 2 {
		t.Fatalf("%d runs rows, want 2", len(rows))
	}
	r1, r2 := rows[0], rows[1]
	if r1.Run != "live" || r1.Journal != "live" || r1.RunNumber != 1 || r1.BootID != "" || r1.Inputs != int64(mid) ||
		r2.Run != "live/2" || r2.Journal != "live" || r2.RunNumber != 2 || r2.BootID != "boot-2" || r2.Inputs != int64(len(after)+1) {
		t.Fatalf("runs rows:\n%+v\n%+v", r1, r2)
	}
	// Run 2's stamps are on its own clock: it starts near 0 (its first
	// odometry at 200 Hz), long before run 1 ended.
	if !(r2.FirstStampNs > 0 && r2.FirstStampNs <= 10e6 && r1.LastStampNs > 3e9) {
		t.Errorf("stamps: run 1 %d..%d, run 2 %d..%d", r1.FirstStampNs, r1.LastStampNs, r2.FirstStampNs, r2.LastStampNs)
	}
	for _, r := range rows {
		if sum := r.Applied + r.Held + r.Gated + r.TooOld + r.Invalid; sum != r.Inputs {
			t.Errorf("run %s: final verdicts add up to %d of %d inputs", r.Run, sum, r.Inputs)
		}
	}
	inputs := readTable[InputRow](t, out, InputsFile)
	count := map[string]int64{}
	for i, in := range inputs {
		count[in.Run]++
		if want := "live"; i >= mid {
			want = "live/2"
			if in.Run != want || (i == mid) != (in.Kind == "run_start") {
				t.Fatalf("input row %d (%s): run %q", i, in.Kind, in.Run)
			}
		} else if in.Run != want {
			t.Fatalf("input row %d: run %q", i, in.Run)
		}
	}
	if count["live"] != r1.Inputs || count["live/2"] != r2.Inputs {
		t.Errorf("input rows by run %v", count)
	}
	if poses := readTable[PoseRow](t, out, PosesFile); len(poses) != len(samples) || poses[mid].Run != "live/2" || poses[mid-1].Run != "live" {
		t.Errorf("%d pose rows for %d inputs", len(poses), len(samples))
	}
	started := 0
	for _, e := range readTable[EventRow](t, out, EventsFile) {
		if e.Kind == "run_started" {
			started++
			if e.Run != "live/2" || e.Value != 2 {
				t.Errorf("run_started event %+v", e)
			}
		}
	}
	if started != 1 {
		t.Errorf("%d run_started events", started)
	}

	// Run 2 alone: its runs row as before, and only its rows.
	only := t.TempDir()
	picked, err := Export(context.Background(), dir, only, Options{Run: 2})
	if err != nil {
		t.Fatal(err)
	}
	if len(picked) != 1 || picked[0] != r2 {
		t.Fatalf("runs of Options.Run 2: %+v", picked)
	}
	for _, in := range readTable[InputRow](t, only, InputsFile) {
		if in.Run != "live/2" {
			t.Fatalf("an input row of run %q", in.Run)
		}
	}
	if n := len(readTable[PoseRow](t, only, PosesFile)); n != int(r2.Inputs) {
		t.Errorf("%d pose rows of run 2, want %d", n, r2.Inputs)
	}
	// No journal holds a run 3: an error, as replay's and review's -run
	// past the last, not empty tables that say the runs had no inputs.
	empty := t.TempDir()
	if none, err := Export(context.Background(), dir, empty, Options{Run: 3}); !errors.Is(err, journal.ErrNoRun) || !strings.Contains(err.Error(), "run 3") || len(none) != 0 {
		t.Errorf("Options.Run 3: %v %v; want journal.ErrNoRun naming run 3", none, err)
	}
	if left, _ := os.ReadDir(empty); len(left) != 0 {
		t.Errorf("Options.Run 3 left %v", left)
	}
}

func toWire(in *fusiontest.Input) *pb.Sample {
	switch {
	case in.Odometry != nil:
		return convert.OdometryToProto(in.Odometry)
	case in.Heading != nil:
		return convert.HeadingToProto(in.Heading)
	}
	return convert.FixToProto(in.Fix)
}
