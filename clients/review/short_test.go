package review

import (
	"bytes"
	"encoding/csv"
	"math"
	"os"
	"strings"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// journalOf writes a journal of robot "cart" configured as cfg that holds
// samples, each as the service takes it.
func journalOf(t *testing.T, cfg fusion.Config, samples ...*pb.Sample) string {
	t.Helper()
	dir := t.TempDir()
	fr, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	j, err := journal.Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: convert.ConfigToProto(cfg)}, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	for _, s := range samples {
		resp, taken := convert.Take(fr, s, 0)
		if !taken {
			t.Fatalf("sample %v not taken: %s", s, resp.GetReason())
		}
		if err := j.AddPair(&pb.JournalInput{Sequence: resp.GetSequence(), Sample: s}, &pb.JournalOutput{Response: resp}); err != nil {
			t.Fatal(err)
		}
	}
	// Close drops what no Flush wrote (Writer.Close).
	if _, err := j.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := j.Close(); err != nil {
		t.Fatal(err)
	}
	return dir
}

// TestReviewOfTheShortestRuns: a run of one odometry sample has one
// estimate, the configured start, and its review says so: one row in each
// export and a 95% position radius of sigma*sqrt(2 ln 20) for a start
// covariance of sigma^2 in x and y (the 95% quantile of a circular
// Gaussian's distance, a Rayleigh distribution: common practice). Before,
// the run had no step, no row, and a radius of 0.000 m, the figure of a
// pose known exactly. A run without odometry (a robot created and never
// fed, or given only a heading) has no estimate, and its summary says
// none instead of 0.000 m and 0.00 deg.
func TestReviewOfTheShortestRuns(t *testing.T) {
	cfg := fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true}.Config()
	const sigma = 0.04
	cfg.StartCov = []float64{sigma * sigma, 0, 0, 0, sigma * sigma, 0, 0, 0, 0.001}
	odo := convert.OdometryToProto(&fusion.Odometry{StampNs: 2e9, Counts: make([]int64, len(cfg.Wheels))})
	heading := convert.HeadingToProto(&fusion.Heading{StampNs: 2e9, HeadingRad: 0.3})

	run, err := Analyze(Source{JournalDir: journalOf(t, cfg, odo), Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	want := sigma * math.Sqrt(2*math.Log(20))
	s := run.Summary
	if s.Estimates != 1 || math.Abs(s.Max95M-want) > 1e-9 || math.Abs(s.Final95M-want) > 1e-9 {
		t.Errorf("one sample (%d inputs): %d estimates, 95%% radius largest %.6f final %.6f m, want 1 and %.6f m", s.Inputs, s.Estimates, s.Max95M, s.Final95M, want)
	}
	if want := math.Sqrt(0.001); math.Abs(s.FinalHeadingSt-want) > 1e-12 {
		t.Errorf("one sample: heading standard deviation %.6f rad, want %.6f", s.FinalHeadingSt, want)
	}
	for _, p := range []string{run.FilteredCSV, run.SmoothedCSV} {
		b, err := os.ReadFile(p)
		if err != nil {
			t.Fatal(err)
		}
		rows, err := csv.NewReader(bytes.NewReader(b)).ReadAll()
		if err != nil || len(rows) != 2 || rows[1][0] != "2000000000" {
			t.Errorf("%s: %v, rows %q; want the header and one row at 2 s", p, err, rows)
		}
	}

	for name, samples := range map[string][]*pb.Sample{"no input": nil, "a heading only": {heading}} {
		run, err := Analyze(Source{JournalDir: journalOf(t, cfg, samples...), Robot: "cart"}, t.TempDir(), Options{})
		if err != nil {
			t.Fatal(err)
		}
		var txt bytes.Buffer
		if err := WriteText(&txt, run); err != nil {
			t.Fatal(err)
		}
		for _, line := range strings.Split(txt.String(), "\n") {
			if strings.Contains(line, "radius") || strings.Contains(line, "heading standard deviation") {
				if !strings.Contains(line, "none: no odometry") || strings.Contains(line, "0.0") {
					t.Errorf("%s: %q, want none", name, line)
				}
			}
		}
	}
}

// TestCompareRadiusOfARunWithoutEstimate: the comparison's table shows no
// largest 95% radius ("-") for a run that had no odometry, and so no
// estimate, as the review's summary says none; it showed 0.000 m, a pose
// known exactly (the probe of session 26). A run with estimates shows its
// radius.
func TestCompareRadiusOfARunWithoutEstimate(t *testing.T) {
	runs := []*Run{{Summary: Summary{Estimates: 0}}, {Summary: Summary{Estimates: 10, Max95M: 0.25}}}
	for _, d := range differences(runs) {
		if d.name != "largest 95% position radius" {
			continue
		}
		if got := [2]string{d.format(d.values[0]), d.format(d.values[1])}; got != [2]string{"-", "0.250 m"} {
			t.Errorf("largest 95%% radius of a run without and one with estimates: %q, want [- 0.250 m]", got)
		}
		return
	}
	t.Fatal("no largest 95% radius row")
}
