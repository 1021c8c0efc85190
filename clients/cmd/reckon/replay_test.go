package main

import (
	"bufio"
	"encoding/csv"
	"errors"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// writeExampleJournal records the example samples under the example
// configuration as the service would, and returns the journal directory,
// the samples and how many of them were held on arrival.
func writeExampleJournal(t *testing.T) (string, []*pb.Sample, int) {
	t.Helper()
	b, err := os.ReadFile(exampleConfig)
	if err != nil {
		t.Fatal(err)
	}
	cp, cfg, err := convert.LoadConfigYAML(b)
	if err != nil {
		t.Fatal(err)
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	dir := t.TempDir()
	j, err := journal.Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: cp}, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	f, err := os.Open(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	var samples []*pb.Sample
	held := 0
	sr := convert.NewSampleReader(f)
	for {
		s, err := sr.Next()
		if err != nil {
			break
		}
		resp, taken := convert.Take(fr, s, 0)
		if !taken {
			continue
		}
		samples = append(samples, s)
		if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
			held++
		}
		if err := j.AddPair(&pb.JournalInput{Sequence: resp.GetSequence(), Sample: s}, &pb.JournalOutput{Response: resp}); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := j.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := j.Close(); err != nil {
		t.Fatal(err)
	}
	return dir, samples, held
}

// TestReplaySamplesRoundTrip: a journal's raw samples exported as JSON
// Lines are the samples recorded, and replayed with the configuration they
// give the same track and verdicts as the journal.
func TestReplaySamplesRoundTrip(t *testing.T) {
	dir, samples, _ := writeExampleJournal(t)
	exported := filepath.Join(t.TempDir(), "samples.jsonl")
	if _, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart", "-format", "samples", "-out", exported); err != nil {
		t.Fatalf("replay -format samples: %v\n%s", err, errs)
	}
	f, _ := os.Open(exported)
	defer f.Close()
	sr := convert.NewSampleReader(bufio.NewReader(f))
	for i, want := range samples {
		got, err := sr.Next()
		if err != nil {
			t.Fatalf("sample %d: %v", i, err)
		}
		if !proto.Equal(got, want) {
			t.Fatalf("sample %d: %v, recorded %v", i, got, want)
		}
	}
	if _, err := sr.Next(); err == nil {
		t.Errorf("more samples exported than recorded")
	}
	fromJournal, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart")
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	fromSamples, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", exported)
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	if strings.Count(fromJournal, "\n") < 500 || fromJournal != fromSamples {
		t.Errorf("the journal and its exported samples replay differently (%d and %d bytes)", len(fromJournal), len(fromSamples))
	}
}

// TestReplayShowsFinalVerdicts: a fix held on arrival shows in the CSV with
// the verdict it was resolved to, not as held.
func TestReplayShowsFinalVerdicts(t *testing.T) {
	dir, _, held := writeExampleJournal(t)
	if held == 0 {
		t.Fatal("the example holds no fix; the test needs one")
	}
	out, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart")
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	rows, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	col := map[string]int{}
	for i, h := range rows[0] {
		col[h] = i
	}
	counts := map[string]int{}
	for _, r := range rows[1:] {
		counts[r[col["verdict"]]]++
	}
	if counts["held"] != 0 || counts["applied"]+counts["gated"] < held {
		t.Errorf("verdicts %v with %d fixes held on arrival", counts, held)
	}
	// In JSON Lines the responses stay as they were, with the resolutions
	// in later lines.
	jl, _, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart", "-format", "jsonl")
	if err != nil || strings.Count(jl, `"verdict":"VERDICT_HELD"`) < held || !strings.Contains(jl, `"resolved"`) {
		t.Errorf("jsonl: %v", err)
	}
}

// TestReplayTimeSpan: -from and -to (seconds or nanoseconds from the run's
// start) keep the rows stamped inside the span.
func TestReplayTimeSpan(t *testing.T) {
	all, _, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	stamps := func(out string) []int64 {
		rows, _ := csv.NewReader(strings.NewReader(out)).ReadAll()
		var s []int64
		for _, r := range rows[1:] {
			v, _ := strconv.ParseInt(r[0], 10, 64)
			s = append(s, v)
		}
		return s
	}
	start := stamps(all)[0]
	for _, c := range []struct{ from, to string }{{"2", "4.5s"}, {"2000000000ns", "4500000000ns"}} {
		out, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", exampleSamples, "-from", c.from, "-to", c.to)
		if err != nil {
			t.Fatalf("%v\n%s", err, errs)
		}
		// The rows' stamps are the poses' (the newest odometry), which
		// follow the samples' stamps by at most an odometry period.
		s := stamps(out)
		if len(s) < 100 || len(s) > len(stamps(all))/2 {
			t.Fatalf("-from %s -to %s: %d rows", c.from, c.to, len(s))
		}
		if first, last := s[0]-start, s[len(s)-1]-start; first < 1.9e9 || last > 4.6e9 {
			t.Errorf("-from %s -to %s: rows from %d to %d ns", c.from, c.to, first, last)
		}
	}
	if _, _, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", exampleSamples, "-from", "soon"); err == nil {
		t.Errorf("-from soon accepted")
	}
}

// TestReplayPastAGap: a journal that lost inputs in its middle (bytes
// damaged) replays past the gap: every input the journal still holds has
// its row, the gap is named, and the exit status is 1, not 0.
func TestReplayPastAGap(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	seg := journal.SegmentPath(dir, "cart", 0)
	b, err := os.ReadFile(seg)
	if err != nil {
		t.Fatal(err)
	}
	for i := len(b) / 3; i < len(b)/3+200; i++ {
		b[i] ^= 0x5a
	}
	if err := os.WriteFile(seg, b, 0o644); err != nil {
		t.Fatal(err)
	}
	scan, err := journal.Read(dir, "cart", journal.Visitor{ReadOnly: true, Gap: func(error) error { return nil }})
	if !errors.Is(err, journal.ErrGap) || scan.Pairs < 100 {
		t.Fatalf("the damaged journal: %d inputs, %v; want a gap", scan.Pairs, err)
	}
	out, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart")
	if err == nil || exitCode(err) != exitFailure || !strings.Contains(errs, "goes on past it") {
		t.Errorf("replay of a journal with a gap: %v (exit %d)\n%s", err, exitCode(err), errs)
	}
	rows, cerr := csv.NewReader(strings.NewReader(out)).ReadAll()
	if cerr != nil || len(rows)-1 != scan.Pairs {
		t.Errorf("%d rows (%v), the journal holds %d inputs", len(rows)-1, cerr, scan.Pairs)
	}
}

// TestReplaySetAside: a deleted robot's journal, set aside by the service,
// replays under the name its files carry, {id}.deleted-{unix ns}, exactly
// as it did live; a name that is not there is refused naming it.
func TestReplaySetAside(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	live, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart")
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	if err := journal.SetAside(nil, dir, "cart"); err != nil {
		t.Fatal(err)
	}
	names, _ := filepath.Glob(filepath.Join(dir, "cart.manifest"+journal.DeletedMark+"*"))
	if len(names) != 1 {
		t.Fatalf("set aside as %v", names)
	}
	_, suffix, _ := strings.Cut(filepath.Base(names[0]), journal.DeletedMark)
	aside, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart"+journal.DeletedMark+suffix)
	if err != nil || aside != live {
		t.Errorf("the set-aside journal replays differently (%d and %d bytes): %v\n%s", len(aside), len(live), err, errs)
	}
	if _, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart"); err == nil || !strings.Contains(err.Error()+errs, "no journal for cart") {
		t.Errorf("replay of the deleted live name: %v\n%s", err, errs)
	}
}
