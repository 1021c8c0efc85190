package main

import (
	"bytes"
	"context"
	"encoding/csv"
	"os"
	"path/filepath"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"testing"
)

func runCmd(t *testing.T, args ...string) (string, string, error) {
	t.Helper()
	var out, errb bytes.Buffer
	err := run(context.Background(), args, strings.NewReader(""), &out, &errb)
	return out.String(), errb.String(), err
}

// TestDemo runs the demo over real gRPC as a user would (as fast as
// possible) and checks that it reports a sensible estimate and leaves a
// journal that replays to the same verdicts.
func TestDemo(t *testing.T) {
	for _, layout := range []string{"free-wheel-turn", "gyro-turn", "drive-wheel-turn"} {
		t.Run(layout, func(t *testing.T) {
			dir := filepath.Join(t.TempDir(), "journal")
			out, errs, err := runCmd(t, "demo", "-layout", layout, "-duration", "60", "-speed", "0", "-view", "lines", "-journal", dir)
			if err != nil {
				t.Fatalf("demo: %v\n%s", err, errs)
			}
			// The track lines come from GetPoseAt right after each sample's
			// verdict, so they do not depend on timing (the watched RMS line
			// samples poses by wall time and is for people).
			if !regexp.MustCompile(`RMS position error of the watched estimate against truth: [0-9.]+ m`).MatchString(out) {
				t.Fatalf("no RMS line in\n%s", out)
			}
			var trackErr []float64
			for _, m := range regexp.MustCompile(`(?m)^ +[0-9.]+ +(?:-?[0-9.]+ +){7}([0-9.]+)  \S+$`).FindAllStringSubmatch(out, -1) {
				e, _ := strconv.ParseFloat(m[1], 64)
				trackErr = append(trackErr, e)
			}
			if len(trackErr) < 10 {
				t.Fatalf("%d track lines in\n%s", len(trackErr), out)
			}
			last := trackErr[len(trackErr)-1]
			sort.Float64s(trackErr)
			if med := trackErr[len(trackErr)/2]; med > 0.05 || last > 0.1 {
				t.Errorf("error against truth: median %.3f m, at the end %.3f m\n%s", med, last, out)
			}
			for _, want := range []string{"recoveries 1", "gated", "sensor camera", "move_recovered"} {
				if !strings.Contains(out, want) {
					t.Errorf("output lacks %q:\n%s", want, out)
				}
			}
			// A sensor called overconfident with its mean NIS inside its
			// band says why: its gate refused more fixes than it allows
			// (the demo's camera, whose outliers are many; the line read
			// "mean NIS 3.02 (95% band 2.72-3.06): overconfident" alone).
			for _, m := range regexp.MustCompile(`(?m)^sensor (\S+) .*mean NIS ([0-9.]+) \(95% band [0-9.]+-([0-9.]+)\): overconfident(.*)$`).FindAllStringSubmatch(out, -1) {
				mean, _ := strconv.ParseFloat(m[2], 64)
				hi, _ := strconv.ParseFloat(m[3], 64)
				if mean <= hi && !strings.Contains(m[4], "gated, more than its gate allows") {
					t.Errorf("sensor %s: overconfident inside its band without the reason: %q", m[1], m[0])
				}
			}
			// The journal the demo left replays to the same verdicts.
			csvPath := filepath.Join(t.TempDir(), "track.csv")
			_, errs, err = runCmd(t, "replay", "-journal", dir, "-robot", "greenhouse-cart", "-out", csvPath)
			if err != nil || !strings.Contains(errs, ", 0 different") {
				t.Fatalf("replay: %v\n%s", err, errs)
			}
			f, _ := os.Open(csvPath)
			defer f.Close()
			rows, err := csv.NewReader(f).ReadAll()
			if err != nil || len(rows) < 10000 || rows[0][0] != "stamp_ns" {
				t.Errorf("track CSV: %d rows, %v", len(rows), err)
			}
		})
	}
}

// TestReplaySamples runs the example configuration and JSON Lines file
// offline, and again with another gate probability.
func TestReplaySamples(t *testing.T) {
	cfg := "../../../testdata/robots/free-wheel-turn.yaml"
	samples := "../../../testdata/samples/greenhouse-10s.jsonl"
	out, errs, err := runCmd(t, "replay", "-config", cfg, "-samples", samples, "-format", "jsonl")
	if err != nil {
		t.Fatalf("%v\n%s", err, errs)
	}
	lines := strings.Count(out, "\n")
	if lines < 500 || !strings.Contains(out, `"verdict":"VERDICT_APPLIED"`) {
		t.Errorf("%d lines of output", lines)
	}
	bad := filepath.Join(t.TempDir(), "bad.yaml")
	os.WriteFile(bad, []byte("imu_mode: absolute\nwheels:\n  - {y_m: 0.1, spokes: 3}\n"), 0o644)
	if _, _, err := runCmd(t, "replay", "-config", bad, "-samples", samples); err == nil || !strings.Contains(err.Error(), "line 3") {
		t.Errorf("bad configuration: %v", err)
	}
}

func TestUnknownCommand(t *testing.T) {
	if _, errs, err := runCmd(t, "fly"); err == nil || !strings.Contains(errs, "usage") {
		t.Errorf("unknown command: err %v, stderr %q", err, errs)
	}
	if _, _, err := runCmd(t, "demo", "-layout", "tricycle"); err == nil {
		t.Errorf("unknown layout accepted")
	}
	if _, _, err := runCmd(t, "replay"); err == nil {
		t.Errorf("replay without arguments accepted")
	}
}

// TestReviewAndCompare: the demo's journal (with the truth it leaves)
// reviewed, and compared under another gate probability.
func TestReviewAndCompare(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "journal")
	if _, errs, err := runCmd(t, "demo", "-duration", "30", "-bump-at", "15", "-speed", "0", "-view", "lines", "-journal", dir); err != nil {
		t.Fatalf("demo: %v\n%s", err, errs)
	}
	out := filepath.Join(t.TempDir(), "review")
	txt, errs, err := runCmd(t, "review", "-journal", dir, "-robot", "greenhouse-cart", "-out", out)
	if err != nil {
		t.Fatalf("review: %v\n%s", err, errs)
	}
	for _, want := range []string{"move recoveries:", "error against truth:", "report: " + filepath.Join(out, "report.html")} {
		if !strings.Contains(txt, want) {
			t.Errorf("review output lacks %q:\n%s", want, txt)
		}
	}
	for _, f := range []string{"report.html", "summary.txt", "greenhouse-cart-filtered.csv", "greenhouse-cart-smoothed.csv"} {
		if st, err := os.Stat(filepath.Join(out, f)); err != nil || st.Size() == 0 {
			t.Errorf("%s: %v", f, err)
		}
	}
	strict := filepath.Join(t.TempDir(), "strict.yaml")
	b, _ := os.ReadFile("../../../testdata/robots/free-wheel-turn.yaml")
	os.WriteFile(strict, []byte(strings.Replace(string(b), "gate_probability: 0.99", "gate_probability: 0.9", 1)), 0o644)
	cmp := filepath.Join(t.TempDir(), "compare")
	txt, errs, err = runCmd(t, "compare", "-journal", dir, "-robot", "greenhouse-cart", "-b", strict, "-out", cmp)
	if err != nil {
		t.Fatalf("compare: %v\n%s", err, errs)
	}
	if !strings.Contains(txt, "review of a-own") || !strings.Contains(txt, "review of b-strict") || !strings.Contains(txt, "gate probability 0.9\n") {
		t.Errorf("compare output:\n%s", txt)
	}
	html, _ := os.ReadFile(filepath.Join(cmp, "report.html"))
	if !strings.Contains(string(html), "fig-track-1") {
		t.Errorf("the comparison report lacks the second run's figures")
	}
}

// TestDemoPage: the demo with -page serves the live view on loopback and
// says where; an address that is not loopback is refused.
func TestDemoPage(t *testing.T) {
	out, errs, err := runCmd(t, "demo", "-duration", "2", "-speed", "0", "-view", "lines", "-page", "127.0.0.1:0", "-journal", filepath.Join(t.TempDir(), "j"))
	if err != nil {
		t.Fatalf("demo -page: %v\n%s", err, errs)
	}
	if !regexp.MustCompile(`(?m)^live view: http://127\.0\.0\.1:[0-9]+/$`).MatchString(out) {
		t.Errorf("demo -page does not say where the live view is:\n%s", out)
	}
	if _, _, err := runCmd(t, "demo", "-duration", "2", "-speed", "0", "-view", "lines", "-page", "0.0.0.0:0", "-journal", filepath.Join(t.TempDir(), "k")); err == nil || !strings.Contains(err.Error(), "not a loopback address") {
		t.Errorf("demo -page 0.0.0.0:0: %v", err)
	}
}

// TestReviewFailedKeepsEarlier: a review (or comparison) into a directory
// that holds an earlier one, which fails after it has begun writing (a
// truth file with a malformed row 5 s into the run, found once the
// filtered track is written), leaves the earlier files as they were and
// nothing beside them. Before, the filtered track was rewritten in place,
// and the earlier set was left a mix of old and new.
func TestReviewFailedKeepsEarlier(t *testing.T) {
	for _, args := range [][]string{
		{"review"},
		{"compare", "-b", exampleConfig},
	} {
		t.Run(args[0], func(t *testing.T) {
			parent := t.TempDir()
			out := filepath.Join(parent, "out")
			cmd := append(args, "-config", exampleConfig, "-samples", exampleSamples, "-out", out)
			if _, errs, code := runCode(t, context.Background(), "", cmd...); code != 0 {
				t.Fatalf("first %s: exit %d\n%s", args[0], code, errs)
			}
			before := map[string]string{}
			entries, _ := os.ReadDir(out)
			for _, e := range entries {
				b, err := os.ReadFile(filepath.Join(out, e.Name()))
				if err != nil {
					t.Fatal(err)
				}
				before[e.Name()] = string(b)
			}
			truth := filepath.Join(parent, "truth.csv")
			if err := os.WriteFile(truth, []byte("stamp_ns,x_m,y_m,heading_rad\n0,0,0,0\n2500000000,1,0,0\n5000000000,2,0,zero\n"), 0o644); err != nil {
				t.Fatal(err)
			}
			_, errs, code := runCode(t, context.Background(), "", append(cmd, "-from", "1", "-truth", truth)...)
			if code != exitRefused || !strings.Contains(errs, "truth.csv") {
				t.Fatalf("%s with a malformed truth file: exit %d, want %d naming it\n%s", args[0], code, exitRefused, errs)
			}
			entries, _ = os.ReadDir(out)
			if len(entries) != len(before) {
				t.Errorf("the output directory holds %d files after the failure, want the earlier %d", len(entries), len(before))
			}
			for name, want := range before {
				if b, err := os.ReadFile(filepath.Join(out, name)); err != nil || string(b) != want {
					t.Errorf("%s changed by the failed %s (%v)", name, args[0], err)
				}
			}
			if entries, _ := os.ReadDir(parent); len(entries) != 2 {
				t.Errorf("beside the output directory: %v, want only it and the truth file", entries)
			}
		})
	}
}
