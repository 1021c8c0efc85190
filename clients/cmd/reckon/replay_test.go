package main

import (
	"bufio"
	"context"
	"encoding/csv"
	"errors"
	"fmt"
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

// flipBytes damages the file at path: the bytes [from, to) that span
// gives for its size are xored with mask.
func flipBytes(t *testing.T, path string, span func(size int) (from, to int), mask byte) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	from, to := span(len(b))
	for i := from; i < to; i++ {
		b[i] ^= mask
	}
	if err := os.WriteFile(path, b, 0o644); err != nil {
		t.Fatal(err)
	}
}

// TestReplayPastAGap: a journal that lost inputs in its middle (bytes
// damaged) replays past the gap: every input the journal still holds has
// its row, the gap is named, and the exit status is 1, not 0.
func TestReplayPastAGap(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	seg := journal.SegmentPath(dir, "cart", 0)
	flipBytes(t, seg, func(size int) (int, int) { return size / 3, size/3 + 200 }, 0x5a)
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

// TestReplayOfAJournalWithoutSegments: a journal whose manifest names
// segments of which none is left (a half-copied directory) replays
// nothing; replay says so and fails instead of writing an empty track
// with exit status 0.
func TestReplayOfAJournalWithoutSegments(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	if err := os.Remove(journal.SegmentPath(dir, "cart", 0)); err != nil {
		t.Fatal(err)
	}
	_, errs, err := runCmd(t, "replay", "-journal", dir, "-robot", "cart")
	if err == nil || exitCode(err) != exitFailure || !strings.Contains(err.Error(), "no segment of cart") {
		t.Errorf("replay of a journal without segments: %v (exit %d)\n%s", err, exitCode(err), errs)
	}
}

// lateFixFirst writes the example samples with their first fix moved to
// the top, as a recording starts when a camera's late fix arrives before
// the odometry it was captured after, and returns the file and the number
// of samples.
func lateFixFirst(t *testing.T) (string, int) {
	t.Helper()
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	var samples []string
	fix := -1
	for _, l := range strings.Split(string(b), "\n") {
		if l == "" || strings.HasPrefix(l, "#") {
			continue
		}
		if fix < 0 && strings.HasPrefix(l, `{"fix"`) {
			fix = len(samples)
		}
		samples = append(samples, l)
	}
	if fix < 1 {
		t.Fatal("the example samples have no fix after their first line")
	}
	samples = append(append([]string{samples[fix]}, samples[:fix]...), samples[fix+1:]...)
	path := filepath.Join(t.TempDir(), "late-fix-first.jsonl")
	if err := os.WriteFile(path, []byte(strings.Join(samples, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	return path, len(samples)
}

// TestReplayInputsBeforeTheFirst: a recording whose first input is a late
// fix, stamped after the odometry that follows it, replays with a row for
// every input: without -from nothing is left out, though the inputs after
// the fix are stamped before the run's start (its first input's stamp);
// they were dropped without a word.
func TestReplayInputsBeforeTheFirst(t *testing.T) {
	path, n := lateFixFirst(t)
	out, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", path)
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	rows, err := csv.NewReader(strings.NewReader(out)).ReadAll()
	if err != nil || len(rows)-1 != n {
		t.Errorf("%d rows (%v) for %d samples", len(rows)-1, err, n)
	}
	// -to alone keeps them too: the stretch starts with the run.
	out, errs, err = runCmd(t, "replay", "-config", exampleConfig, "-samples", path, "-to", "1")
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	if rows, _ := csv.NewReader(strings.NewReader(out)).ReadAll(); len(rows) < 2 || rows[1][1] != "1" || rows[2][1] != "2" {
		t.Errorf("-to 1: the rows start with %v", rows[1:min(3, len(rows))])
	}
}

// TestReviewInputsBeforeTheFirst: review, like replay, covers the inputs
// stamped before the run's first input when no -from is given: the
// summary counts every sample.
func TestReviewInputsBeforeTheFirst(t *testing.T) {
	path, n := lateFixFirst(t)
	out := filepath.Join(t.TempDir(), "review")
	txt, errs, err := runCmd(t, "review", "-config", exampleConfig, "-samples", path, "-out", out)
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	if want := fmt.Sprintf(", %d inputs\n", n); !strings.Contains(txt, want) {
		t.Errorf("the summary does not count the %d samples:\n%s", n, txt)
	}
}

// TestReviewRefusesABadTruthFile: review stops at a truth file that is not
// a time-ordered table of stamp_ns,x_m,y_m,heading_rad, naming the file
// and its line, with exit status 5 (input refused). It went on: a row
// with a number it could not read took it as 0 or NaN (an RMS error of
// NaN), short rows and stamps in seconds were skipped as headers (no truth
// matched, or one step), rows out of order matched one step, all without
// a word.
func TestReviewRefusesABadTruthFile(t *testing.T) {
	dir := t.TempDir()
	samples, truth := filepath.Join(dir, "run.jsonl"), filepath.Join(dir, "truth.csv")
	writeRun(t, samples, truth, 5)
	b, err := os.ReadFile(truth)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(strings.TrimSuffix(string(b), "\n"), "\n")
	if len(lines) < 100 {
		t.Fatalf("the truth has %d lines", len(lines))
	}
	edit := func(f func(i int, fields []string) []string) string {
		out := []string{lines[0]}
		for i, l := range lines[1:] {
			out = append(out, strings.Join(f(i+2, strings.Split(l, ",")), ","))
		}
		return strings.Join(out, "\n") + "\n"
	}
	for _, c := range []struct {
		name, text, want string
	}{
		{"a NaN", edit(func(i int, f []string) []string {
			if i == 50 {
				f[1] = "NaN"
			}
			return f
		}), `line 50: x_m "NaN" is not a finite number`},
		{"no heading column", edit(func(_ int, f []string) []string { return f[:3] }), "line 2: 3 fields"},
		{"stamps in seconds", edit(func(_ int, f []string) []string {
			ns, _ := strconv.ParseInt(f[0], 10, 64)
			f[0] = strconv.FormatFloat(float64(ns)*1e-9, 'f', -1, 64)
			return f
		}), "is not an integer (nanoseconds)"},
		{"out of order", edit(func(i int, f []string) []string {
			if i == 60 {
				f[0] = "1"
			}
			return f
		}), "line 60: stamp_ns 1 is not after"},
		{"header only", lines[0] + "\n", "no rows"},
		{"a directory", "", "is a directory"},
	} {
		bad := filepath.Join(dir, "bad.csv")
		if c.name == "a directory" {
			bad = t.TempDir()
		} else if err := os.WriteFile(bad, []byte(c.text), 0o644); err != nil {
			t.Fatal(err)
		}
		_, errs, code := runCode(t, context.Background(), "", "review", "-config", exampleConfig, "-samples", samples, "-truth", bad, "-out", filepath.Join(dir, "review"))
		if code != exitRefused || !strings.Contains(errs, bad) || !strings.Contains(errs, c.want) {
			t.Errorf("%s: exit %d, want %d; stderr %q lacks the file and %q", c.name, code, exitRefused, errs, c.want)
		}
	}
	if _, errs, code := runCode(t, context.Background(), "", "review", "-config", exampleConfig, "-samples", samples, "-truth", truth, "-out", filepath.Join(dir, "review")); code != exitOK {
		t.Errorf("the good truth: exit %d\n%s", code, errs)
	}
}

// TestReplayTimeSpanPerRun: -from and -to count from each run's own start
// when replay writes every run: a controller restart begins a clock of
// its own, here 100 s behind the first run's (which started at the
// controller's uptime of 100 s). The second run's rows were measured from
// the first run's start, so that -from 1 left every one of them out.
func TestReplayTimeSpanPerRun(t *testing.T) {
	var b strings.Builder
	for i, path := range []string{rebootSamples1, rebootSamples2} {
		f, err := os.Open(path)
		if err != nil {
			t.Fatal(err)
		}
		sr := convert.NewSampleReader(f)
		for {
			s, err := sr.Next()
			if err != nil {
				break
			}
			if i == 0 {
				switch v := s.GetSample().(type) {
				case *pb.Sample_Odometry:
					v.Odometry.StampNs += 100e9
				case *pb.Sample_Heading:
					v.Heading.StampNs += 100e9
				case *pb.Sample_Fix:
					v.Fix.StampNs += 100e9
				}
			}
			convert.WriteJSONLine(&b, s)
		}
		f.Close()
		if i == 0 {
			b.WriteString(`{"run_start":{"boot_id":"boot-2"}}` + "\n")
		}
	}
	path := filepath.Join(t.TempDir(), "two-runs.jsonl")
	if err := os.WriteFile(path, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	out, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", path, "-from", "1", "-to", "2")
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	rows, _ := csv.NewReader(strings.NewReader(out)).ReadAll()
	// The rows' stamps are the poses' (the newest odometry), which follow
	// the samples' by an odometry period (20 ms), a late fix's by its
	// lateness (up to 200 ms in the simulator's camera); the run start's
	// row, written whatever the span, has the new run's pose before its
	// first odometry (stamp 0).
	var one, two, starts int
	for _, r := range rows[1:] {
		switch ns, _ := strconv.ParseInt(r[0], 10, 64); {
		case ns >= 101e9 && ns <= 102.25e9:
			one++
		case ns >= 1e9 && ns <= 2.25e9:
			two++
		case ns == 0 && starts == 0:
			starts++
		default:
			t.Errorf("a row stamped %d ns, outside 1 to 2 s of either run", ns)
		}
	}
	// Each second holds 50 odometry samples, 25 headings and some fixes.
	if one < 75 || two < 75 {
		t.Errorf("-from 1 -to 2: %d rows of run 1 and %d of run 2; want each run's second", one, two)
	}
}

// TestReplaySamplesNamesRefusals: replay of a samples file says, as feed
// does, how many samples got which verdict and names the file and line of
// each refused one with its reason; it said only "replayed N samples", the
// line of a refused sample left to be worked out from the track's rows.
func TestReplaySamplesNamesRefusals(t *testing.T) {
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	lines := strings.SplitAfter(string(b), "\n")
	bad := `{"heading":{"stamp_ns":"3000000000","heading_rad":"NaN"}}` + "\n"
	lines = append(lines[:400], append([]string{bad}, lines[400:]...)...)
	path := filepath.Join(t.TempDir(), "nan.jsonl")
	if err := os.WriteFile(path, []byte(strings.Join(lines, "")), 0o644); err != nil {
		t.Fatal(err)
	}
	_, errs, err := runCmd(t, "replay", "-config", exampleConfig, "-samples", path, "-out", filepath.Join(t.TempDir(), "track.csv"))
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	if !strings.Contains(errs, path+":401: invalid: ") || !strings.Contains(errs, "heading_rad NaN") || !strings.Contains(errs, "invalid 1") {
		t.Errorf("replay does not name the refused sample's line 401 and count it:\n%s", errs)
	}
}

// TestTimeSpanToBeforeFrom: -to before -from is a usage error (exit 2) in
// replay, review and compare; replay wrote nothing at all (not even the
// CSV header) and review an empty report of "no problem found", both with
// exit status 0.
func TestTimeSpanToBeforeFrom(t *testing.T) {
	out := t.TempDir()
	for _, args := range [][]string{
		{"replay", "-config", exampleConfig, "-samples", exampleSamples, "-from", "5", "-to", "2"},
		{"review", "-config", exampleConfig, "-samples", exampleSamples, "-from", "5", "-to", "2", "-out", filepath.Join(out, "review")},
		{"compare", "-config", exampleConfig, "-samples", exampleSamples, "-b", exampleConfig, "-from", "5s", "-to", "2000000000ns", "-out", filepath.Join(out, "compare")},
	} {
		_, errs, code := runCode(t, context.Background(), "", args...)
		if code != exitUsage || !strings.Contains(errs, "-to 2s is before -from 5s") {
			t.Errorf("%s -from 5 -to 2: exit %d, want %d\n%s", args[0], code, exitUsage, errs)
		}
	}
}

// TestTimeSpanPastTheEnd: a -from past the end of the run (20 s of a run
// of 10 s) holds no input: replay, review and compare say so, naming
// where the run's inputs end, with exit 2 (a bad argument), and write no
// output. Before, replay wrote nothing at all (not even the CSV header),
// and review and compare a report of 0 inputs that still showed the whole
// run's NIS, all with exit status 0.
func TestTimeSpanPastTheEnd(t *testing.T) {
	dir := t.TempDir()
	for _, args := range [][]string{
		{"replay", "-config", exampleConfig, "-samples", exampleSamples, "-from", "20", "-out", filepath.Join(dir, "replay.csv")},
		{"review", "-config", exampleConfig, "-samples", exampleSamples, "-from", "20", "-out", filepath.Join(dir, "review")},
		{"compare", "-config", exampleConfig, "-samples", exampleSamples, "-b", exampleConfig, "-from", "20s", "-out", filepath.Join(dir, "compare")},
	} {
		_, errs, code := runCode(t, context.Background(), "", args...)
		if code != exitUsage || !strings.Contains(errs, "no input is stamped from 20.000 s to its end after the run's start; the inputs reach 10.000 s") {
			t.Errorf("%s -from 20: exit %d, want %d\n%s", args[0], code, exitUsage, errs)
		}
	}
	for _, out := range []string{"replay.csv", "review/report.html", "compare/report.html"} {
		if _, err := os.Stat(filepath.Join(dir, out)); !os.IsNotExist(err) {
			t.Errorf("%s written (%v)", out, err)
		}
	}
}

// TestReviewStretchNIS: the NIS record of a sensor in the review of a
// stretch (-from 5 -to 6) is the stretch's: its applied count is the
// stretch's applied fixes (all of them the camera's). Before, it was the
// whole run's (94 applied against the stretch's 9), and so was the
// consistency verdict it gave.
func TestReviewStretchNIS(t *testing.T) {
	out, errs, code := runCode(t, context.Background(), "", "review", "-config", exampleConfig, "-samples", exampleSamples, "-from", "5", "-to", "6", "-out", filepath.Join(t.TempDir(), "review"))
	if code != exitOK {
		t.Fatalf("review: exit %d\n%s", code, errs)
	}
	var fixes, nis int
	for _, line := range strings.Split(out, "\n") {
		line = strings.TrimSpace(line)
		if v, ok := strings.CutPrefix(line, "fixes:"); ok {
			fmt.Sscanf(strings.TrimSpace(v), "applied %d", &fixes)
		}
		if _, v, ok := strings.Cut(line, "NIS of camera:"); ok {
			_, after, _ := strings.Cut(v, " over ")
			fmt.Sscanf(after, "%d applied", &nis)
		}
	}
	if fixes == 0 || nis != fixes {
		t.Errorf("the stretch applied %d fixes; the camera's NIS line counts %d\n%s", fixes, nis, out)
	}
}

// TestReviewOfUnreadableSamples: a samples file with no sample that can
// be read (not JSON Lines at all, or empty) is refused naming the file
// and line, exit 5, as replay refuses it; review wrote a report of 0
// inputs ("no problem found") and exited 0. A file that stops being
// readable after some samples (its last line cut) is still reviewed up
// to there, the report saying so.
func TestReviewOfUnreadableSamples(t *testing.T) {
	dir := t.TempDir()
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name string
		text []byte
		code int
		want string
	}{
		{"binary", []byte("\x00\x01\x02 not json\n{}\n"), exitRefused, "line 1: "},
		{"empty", nil, exitRefused, "no samples"},
		{"comments only", []byte("# a header\n\n"), exitRefused, "no samples"},
		{"last line cut", b[:len(b)-20], exitOK, ""},
	} {
		path := filepath.Join(dir, "samples.jsonl")
		if err := os.WriteFile(path, c.text, 0o644); err != nil {
			t.Fatal(err)
		}
		out, errs, code := runCode(t, context.Background(), "", "review", "-config", exampleConfig, "-samples", path, "-out", filepath.Join(dir, "review"))
		switch {
		case c.code == exitOK && (code != exitOK || !strings.Contains(out, "stops being readable")):
			t.Errorf("%s: exit %d; the report should say where the file stops being readable:\n%s%s", c.name, code, out, errs)
		case c.code != exitOK && (code != c.code || !strings.Contains(errs, path) || !strings.Contains(errs, c.want)):
			t.Errorf("%s: exit %d, want %d; stderr %q lacks the file and %q", c.name, code, c.code, errs, c.want)
		}
	}
}

// TestReplayOfNoSamples: a samples file without a sample (empty, or
// comments only) is refused, exit 5, as review refuses it; replay wrote
// an empty output, not even the CSV header, and exited 0.
func TestReplayOfNoSamples(t *testing.T) {
	path := filepath.Join(t.TempDir(), "samples.jsonl")
	for _, text := range []string{"", "# a header\n\n"} {
		if err := os.WriteFile(path, []byte(text), 0o644); err != nil {
			t.Fatal(err)
		}
		_, errs, code := runCode(t, context.Background(), "", "replay", "-config", exampleConfig, "-samples", path)
		if code != exitRefused || !strings.Contains(errs, path) || !strings.Contains(errs, "no samples") {
			t.Errorf("%q: exit %d, want %d\n%s", text, code, exitRefused, errs)
		}
	}
}

// TestReplayFailureKeepsTheOutput: a replay that fails before it has a row
// to write (a samples file or journal that is missing or unreadable, a bad
// configuration) leaves -out as it was: it created (truncated) -out first,
// so that a typo in the samples path emptied the track written before.
func TestReplayFailureKeepsTheOutput(t *testing.T) {
	dir := t.TempDir()
	out := filepath.Join(dir, "track.csv")
	const before = "stamp_ns,sequence\n1,1\n"
	bad := filepath.Join(dir, "bad.yaml")
	if err := os.WriteFile(bad, []byte("gate_probability: 99\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, args := range [][]string{
		{"-config", exampleConfig, "-samples", filepath.Join(dir, "missing.jsonl")},
		{"-config", exampleConfig, "-samples", dir},
		{"-config", bad, "-samples", exampleSamples},
		{"-journal", dir, "-robot", "cart"},
		{"-config", exampleConfig, "-samples", exampleSamples, "-run", "2"},
		{"-config", exampleConfig, "-samples", exampleSamples, "-from", "100"}, // TestTimeSpanPastTheEnd
	} {
		if err := os.WriteFile(out, []byte(before), 0o644); err != nil {
			t.Fatal(err)
		}
		_, errs, err := runCmd(t, append([]string{"replay", "-out", out}, args...)...)
		if err == nil {
			t.Errorf("%v: replay succeeded", args)
		}
		if b, _ := os.ReadFile(out); string(b) != before {
			t.Errorf("%v: the failed replay (%v) changed -out to %q\n%s", args, err, b, errs)
		}
	}
	// A replay that succeeds writes it.
	if _, errs, err := runCmd(t, "replay", "-out", out, "-config", exampleConfig, "-samples", exampleSamples); err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	if b, _ := os.ReadFile(out); !strings.HasPrefix(string(b), "stamp_ns,sequence,x_m") {
		t.Errorf("the replay wrote %.100q", b)
	}
}

// TestReplayNeverOverwritesItsInput: -out naming the samples file or the
// configuration is a usage error (exit 2) and the file stays as it was:
// replay -format samples -out of the file it read emptied it (0 samples
// replayed, exit 0), the recording lost.
func TestReplayNeverOverwritesItsInput(t *testing.T) {
	dir := t.TempDir()
	samples, config := filepath.Join(dir, "run.jsonl"), filepath.Join(dir, "robot.yaml")
	for src, dst := range map[string]string{exampleSamples: samples, exampleConfig: config} {
		b, err := os.ReadFile(src)
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(dst, b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	want, _ := os.ReadFile(samples)
	wantCfg, _ := os.ReadFile(config)
	for _, out := range []string{samples, filepath.Join(dir, ".", "run.jsonl"), config} {
		_, errs, code := runCode(t, context.Background(), "", "replay", "-config", config, "-samples", samples, "-format", "samples", "-out", out)
		if code != exitUsage || !strings.Contains(errs, "never overwritten") {
			t.Errorf("-out %s: exit %d, want %d\n%s", out, code, exitUsage, errs)
		}
	}
	if b, _ := os.ReadFile(samples); string(b) != string(want) {
		t.Errorf("the samples file was changed: %d bytes, were %d", len(b), len(want))
	}
	if b, _ := os.ReadFile(config); string(b) != string(wantCfg) {
		t.Errorf("the configuration was changed")
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

// TestOfflineNoSuchRobot: the offline commands given a robot that the
// journal directory holds no journal of exit 4, "no such robot", as the
// commands that ask the service do, and leave no -out directory of their
// own behind. Before, they exited 1 (any other failure) with the same
// message; then export still did, and review, compare and export left an
// empty -out directory.
func TestOfflineNoSuchRobot(t *testing.T) {
	dir, out := t.TempDir(), t.TempDir()
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"replay", "-journal", dir, "-robot", "nosuch"}, "no journal for nosuch in " + dir},
		{[]string{"review", "-journal", dir, "-robot", "nosuch", "-out", filepath.Join(out, "review")}, "no journal for nosuch in " + dir},
		{[]string{"compare", "-journal", dir, "-robot", "nosuch", "-b", exampleConfig, "-out", filepath.Join(out, "compare")}, "no journal for nosuch in " + dir},
		{[]string{"export", "-journal", dir, "-robot", "nosuch", "-out", filepath.Join(out, "export", "tables")}, `no journal to export for robot "nosuch"`},
		// tune and calibrate named the directory twice ("DIR: no journal
		// for nosuch in DIR") when they read its configuration from the
		// journal.
		{[]string{"tune", "-journal", dir, "-robot", "nosuch", "-out", filepath.Join(out, "tuned.yaml")}, "reckon tune: no journal for nosuch in " + dir},
		{[]string{"calibrate", "-journal", dir, "-robot", "nosuch", "-out", filepath.Join(out, "calibrated.yaml")}, "reckon calibrate: no journal for nosuch in " + dir},
	} {
		_, errs, code := runCode(t, context.Background(), "", c.args...)
		if code != exitNotFound || !strings.Contains(errs, c.want) {
			t.Errorf("%s of a robot without a journal: exit %d, want %d and %q\n%s", c.args[0], code, exitNotFound, c.want, errs)
		}
	}
	if left, _ := os.ReadDir(out); len(left) != 0 {
		t.Errorf("left behind: %v", left)
	}
}

// TestOfflineNoJournalDirectory: every command that takes -journal refuses
// one that names no directory (none there, or a file) as a usage error
// (exit 2) naming it, and leaves no output behind. Before, each failed with
// the file system's error ("open DIR: no such file or directory", or "not a
// directory") and exit 1, any other failure.
func TestOfflineNoJournalDirectory(t *testing.T) {
	out := t.TempDir()
	file := filepath.Join(t.TempDir(), "journal.txt")
	if err := os.WriteFile(file, []byte("not a journal\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct{ dir, want string }{
		{filepath.Join(out, "nosuch"), "no such directory"},
		{file, "not a directory"},
	} {
		for _, args := range [][]string{
			{"replay", "-robot", "cart", "-out", filepath.Join(out, "replay.csv")},
			{"review", "-robot", "cart", "-out", filepath.Join(out, "review")},
			{"compare", "-robot", "cart", "-b", exampleConfig, "-out", filepath.Join(out, "compare")},
			{"export", "-out", filepath.Join(out, "export")},
			{"tune", "-robot", "cart", "-out", filepath.Join(out, "tuned.yaml")},
			{"calibrate", "-robot", "cart", "-out", filepath.Join(out, "calibrated.yaml")},
		} {
			_, errs, code := runCode(t, context.Background(), "", append(args, "-journal", c.dir)...)
			want := "reckon " + args[0] + ": -journal " + c.dir + ": " + c.want
			if code != exitUsage || !strings.Contains(errs, want) {
				t.Errorf("%s -journal %s: exit %d, want %d and %q\n%s", args[0], c.dir, code, exitUsage, want, errs)
			}
		}
	}
	if left, _ := os.ReadDir(out); len(left) != 0 {
		t.Errorf("left behind: %v", left)
	}
}

// TestOfflineNoSuchRun: every command that takes -run refuses a run past
// the recording's last as a usage error (exit 2), as -from and -to outside
// it, naming the runs it holds, and leaves no output behind: no -out
// directory of its own (review, compare, export) and no file (replay,
// tune). Before, replay, review and export exited 1, tune and calibrate 5,
// export left an empty -out directory and review one holding the filtered
// track's header.
func TestOfflineNoSuchRun(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	out := t.TempDir()
	src := []string{"-journal", dir, "-robot", "cart", "-run", "2"}
	for _, c := range []struct {
		args []string
		want string
	}{
		{[]string{"replay", "-out", filepath.Join(out, "replay.csv")}, "the recording holds runs 1 to 1"},
		{[]string{"review", "-out", filepath.Join(out, "review")}, "the recording holds runs 1 to 1"},
		{[]string{"compare", "-b", exampleConfig, "-out", filepath.Join(out, "compare")}, "the recording holds runs 1 to 1"},
		{[]string{"export", "-out", filepath.Join(out, "export")}, "no journal holds a run 2"},
		{[]string{"tune", "-out", filepath.Join(out, "tuned.yaml")}, "the recording holds runs 1 to 1"},
		{[]string{"calibrate", "-out", filepath.Join(out, "calibrated.yaml")}, "the recording holds runs 1 to 1"},
	} {
		_, errs, code := runCode(t, context.Background(), "", append(c.args, src...)...)
		if code != exitUsage || !strings.Contains(errs, c.want) {
			t.Errorf("%s -run 2 of 1 run: exit %d, want %d and %q\n%s", c.args[0], code, exitUsage, c.want, errs)
		}
	}
	if left, _ := os.ReadDir(out); len(left) != 0 {
		t.Errorf("left behind: %v", left)
	}
	// A directory that was there before is the user's: it stays.
	mine := filepath.Join(out, "mine")
	if err := os.Mkdir(mine, 0o755); err != nil {
		t.Fatal(err)
	}
	if _, _, code := runCode(t, context.Background(), "", append([]string{"review", "-out", mine}, src...)...); code != exitUsage {
		t.Errorf("review -run 2 into an existing directory: exit %d", code)
	}
	if _, err := os.Stat(mine); err != nil {
		t.Errorf("review removed the existing -out directory: %v", err)
	}
}

// TestOfflineBadRobotName: a -robot that is no robot id or name, nor a
// deleted robot's journal, is a usage error (exit 2) naming it in every
// offline command, as export and the commands that ask the service refuse
// it. Before, replay, review, compare, tune and calibrate looked for a
// journal of it and exited 4, no such robot.
func TestOfflineBadRobotName(t *testing.T) {
	dir, out := t.TempDir(), t.TempDir()
	for _, args := range [][]string{
		{"replay"},
		{"review", "-out", filepath.Join(out, "review")},
		{"compare", "-b", exampleConfig, "-out", filepath.Join(out, "compare")},
		{"tune", "-out", filepath.Join(out, "tuned.yaml")},
		{"calibrate", "-out", filepath.Join(out, "calibrated.yaml")},
		{"export", "-out", filepath.Join(out, "export")},
	} {
		_, errs, code := runCode(t, context.Background(), "", append(args, "-journal", dir, "-robot", "Not_A_Name")...)
		if code != exitUsage || !strings.Contains(errs, `"robots/Not_A_Name" is not a robot name`) {
			t.Errorf("%s -robot Not_A_Name: exit %d, want %d\n%s", args[0], code, exitUsage, errs)
		}
	}
	if left, _ := os.ReadDir(out); len(left) != 0 {
		t.Errorf("left behind: %v", left)
	}
}

// TestCompareReadsBothConfigurationsFirst: compare with a -b it cannot
// read refuses it before replaying the run under -a, and leaves no -out
// directory. Before, it wrote the first run's exports into a new -out
// directory, then failed.
func TestCompareReadsBothConfigurationsFirst(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	out := filepath.Join(t.TempDir(), "compare")
	bad := filepath.Join(t.TempDir(), "bad.yaml")
	if err := os.WriteFile(bad, []byte("wheels: [\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	_, errs, code := runCode(t, context.Background(), "", "compare", "-journal", dir, "-robot", "cart", "-b", bad, "-out", out)
	if code != exitRefused || !strings.Contains(errs, bad) {
		t.Errorf("compare -b of a malformed file: exit %d, want %d naming it\n%s", code, exitRefused, errs)
	}
	if _, err := os.Stat(out); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("compare -b of a malformed file left %s: %v", out, err)
	}
}

// TestCompareOutDefault: compare's -h names the directory compare writes
// without -out, review-<robot>-compare. Before, it showed review's
// default, review-<robot>, a directory compare never writes.
func TestCompareOutDefault(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	cfg, err := filepath.Abs(exampleConfig)
	if err != nil {
		t.Fatal(err)
	}
	t.Chdir(t.TempDir())
	help, _, _ := runCode(t, context.Background(), "", "compare", "-h")
	if !strings.Contains(help, "(default review-<robot>-compare, review-<robot>-run<N>-compare with -run)") {
		t.Errorf("compare -h does not name its default -out directory:\n%s", help)
	}
	for _, run := range []string{"", "1"} {
		args := []string{"compare", "-journal", dir, "-robot", "cart", "-b", cfg}
		want := "review-cart-compare"
		if run != "" {
			args, want = append(args, "-run", run), "review-cart-run1-compare"
		}
		if _, errs, code := runCode(t, context.Background(), "", args...); code != exitOK {
			t.Fatalf("%v: exit %d\n%s", args, code, errs)
		}
		if _, err := os.Stat(filepath.Join(want, "report.html")); err != nil {
			t.Errorf("%v: %v", args, err)
		}
	}
}

// TestOfflineSaysJournalDamage: a journal whose segment header was
// overwritten (the scan resynchronises at the first intact record, so no
// input is lost and no gap is reported) is read whole by replay, review,
// tune and calibrate, and each says where the damage is, as export does.
// Before, they said nothing of it: damage that cost no input went unsaid.
func TestOfflineSaysJournalDamage(t *testing.T) {
	dir, samples, _ := writeExampleJournal(t)
	seg := journal.SegmentPath(dir, "cart", 0)
	flipBytes(t, seg, func(int) (int, int) { return 0, 8 }, 0xff)
	scan, err := journal.Read(dir, "cart", journal.Visitor{ReadOnly: true})
	if err != nil || len(scan.Damage) != 1 || scan.Pairs != len(samples) {
		t.Fatalf("the damaged journal: %d of %d inputs, damage %v, %v; want all of them and one damaged range", scan.Pairs, len(samples), scan.Damage, err)
	}
	want := "journal damage in " + seg + " at byte 0"
	out := t.TempDir()
	for _, args := range [][]string{
		{"replay", "-journal", dir, "-robot", "cart", "-out", filepath.Join(out, "track.csv")},
		{"review", "-journal", dir, "-robot", "cart", "-out", filepath.Join(out, "review")},
		{"tune", "-journal", dir, "-robot", "cart", "-config", exampleConfig, "-out", filepath.Join(out, "tuned.yaml")},
		{"calibrate", "-journal", dir, "-robot", "cart", "-config", exampleConfig, "-out", filepath.Join(out, "calibrated.yaml")},
	} {
		stdout, stderr, code := runCode(t, context.Background(), "", args...)
		if code != exitOK || !strings.Contains(stdout+stderr, want) {
			t.Errorf("%s of a journal with a damaged header: exit %d, want 0 and a note %q\n%s%s", args[0], code, want, stdout, stderr)
		}
	}
	report, err := os.ReadFile(filepath.Join(out, "review", "report.html"))
	if err != nil || !strings.Contains(string(report), "journal damage in") {
		t.Errorf("the review's report does not name the damage: %v", err)
	}
}
