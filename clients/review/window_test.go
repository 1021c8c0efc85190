package review

import (
	"bytes"
	"encoding/csv"
	"errors"
	"os"
	"strconv"
	"strings"
	"testing"

	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// strictConfig returns the run's configuration with a gate probability of
// 0.9.
func strictConfig(t *testing.T, run *Run) *pb.RobotConfig {
	cfg := run.Config
	cfg.GateProbability = 0.9
	return convert.ConfigToProto(cfg)
}

// TestReviewOfAStretch: Options.FromNs and ToNs limit the summary and the
// exports to a stretch of the run, and the fixes' export gives each fix its
// final verdict.
func TestReviewOfAStretch(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 77, DurationS: 30, OutlierFraction: 0.1})
	whole, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	part, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{FromNs: 10e9, ToNs: 20e9})
	if err != nil {
		t.Fatal(err)
	}
	s := part.Summary
	if s.RunStartNs != whole.Summary.RunStartNs || s.StartNs < s.RunStartNs+10e9 || s.EndNs > s.RunStartNs+20e9 || s.Inputs < whole.Summary.Inputs/4 || s.Inputs > whole.Summary.Inputs/2 {
		t.Errorf("stretch from %d to %d ns of a run from %d, %d of %d inputs", s.StartNs, s.EndNs, s.RunStartNs, s.Inputs, whole.Summary.Inputs)
	}
	f, _ := os.Open(part.FilteredCSV)
	rows, err := csv.NewReader(f).ReadAll()
	f.Close()
	if err != nil || len(rows) < 1000 {
		t.Fatalf("%d rows, %v", len(rows), err)
	}
	for _, r := range rows[1:] {
		if v, _ := strconv.ParseInt(r[0], 10, 64); v < s.RunStartNs+10e9 || v > s.RunStartNs+20e9 {
			t.Fatalf("a row at %d ns, outside the stretch", v-s.RunStartNs)
		}
	}
	if !s.HasTruth || s.TruthMatched < s.TruthSteps*9/10 {
		t.Errorf("truth matched %d of %d steps", s.TruthMatched, s.TruthSteps)
	}
	// Every fix of the whole run once in its export, none left held.
	f, _ = os.Open(whole.FixesCSV)
	fixes, err := csv.NewReader(f).ReadAll()
	f.Close()
	if err != nil {
		t.Fatal(err)
	}
	counts := map[string]int{}
	for _, r := range fixes[1:] {
		counts[r[4]]++
	}
	total := 0
	for _, n := range whole.Summary.Fixes {
		total += n
	}
	if len(fixes)-1 != total || counts["held"] != whole.Summary.Fixes["held"] || counts["gated"] != whole.Summary.Fixes["gated"] || counts["gated"] == 0 {
		t.Errorf("fixes export %v, summary %v", counts, whole.Summary.Fixes)
	}
}

// TestCompareOverlays: the comparison of two configurations draws both
// runs on the same figures and tabulates their differences.
func TestCompareOverlays(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 78, DurationS: 20, OutlierFraction: 0.1})
	a, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth, Label: "a-own"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	b, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth, Label: "b-strict", Override: strictConfig(t, a)}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if b.Config.GateProbability != 0.9 {
		t.Fatalf("the second run's gate probability is %g", b.Config.GateProbability)
	}
	var page bytes.Buffer
	if err := WriteHTML(&page, "comparison", a, b); err != nil {
		t.Fatal(err)
	}
	h := page.String()
	for _, want := range []string{`id="cmp-track"`, `id="cmp-deviation"`, `id="cmp-nis-camera"`, `class="gate-line run-0"`, `class="gate-line run-1"`,
		`class="differences"`, "RMS position error, filtered", "fixes refused", "time not trusted", ">a-own<", ">b-strict<"} {
		if !strings.Contains(h, want) {
			t.Errorf("the comparison lacks %s", want)
		}
	}
	// The stricter gate refuses more fixes.
	if a.Summary.refusedFixes() >= b.Summary.refusedFixes() {
		t.Errorf("refused %d with p 0.99, %d with p 0.9", a.Summary.refusedFixes(), b.Summary.refusedFixes())
	}
}

// TestReviewOfAnEmptyStretch: a stretch past the run's end is refused
// with ErrEmptyStretch naming where the run's inputs end, and leaves no
// track export behind; it returns rather than hangs (the smoothed track's
// writer once read its channel after the review had let go of it). Before,
// it gave a report of 0 inputs, "no problem found".
func TestReviewOfAnEmptyStretch(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 81, DurationS: 5})
	out := t.TempDir()
	_, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, out, Options{FromNs: 100e9})
	if !errors.Is(err, ErrEmptyStretch) || !strings.Contains(err.Error(), "from 100.000 s to its end") || !strings.Contains(err.Error(), "the inputs reach 4.9") {
		t.Fatalf("a stretch past the run's end: %v", err)
	}
	if files, _ := os.ReadDir(out); len(files) != 0 {
		t.Errorf("left %v", files)
	}
}
