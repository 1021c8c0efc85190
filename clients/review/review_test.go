package review

import (
	"bufio"
	"bytes"
	"encoding/csv"
	"fmt"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// writeRun records a simulated run as a journal (as the service writes it)
// and a truth CSV, and returns the journal directory and the truth path.
func writeRun(t testing.TB, sc fusiontest.Scenario) (string, string) {
	return writeRunWith(t, sc, nil)
}

// writeRunWith is writeRun with each sample changed by alter (if set)
// before the robot takes it, as a miswired sensor would change it.
func writeRunWith(t testing.TB, sc fusiontest.Scenario, alter func(*pb.Sample)) (string, string) {
	return writeRunConfigured(t, sc, nil, alter)
}

// writeRunConfigured is writeRunWith with the robot's configuration
// changed by configure (if set) before the robot is made and journaled.
func writeRunConfigured(t testing.TB, sc fusiontest.Scenario, configure func(*fusion.Config), alter func(*pb.Sample)) (string, string) {
	dir := t.TempDir()
	s := fusiontest.New(sc)
	cfg := s.Config()
	if configure != nil {
		configure(&cfg)
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	j, err := journal.Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: convert.ConfigToProto(cfg)}, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	// The truth goes to its file as the run goes, so that a long run's
	// setup does not raise the peak memory the benchmark reports.
	tp := filepath.Join(dir, "truth.csv")
	tf, err := os.Create(tp)
	if err != nil {
		t.Fatal(err)
	}
	truth := bufio.NewWriter(tf)
	truth.WriteString("stamp_ns,x_m,y_m,heading_rad\n")
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		var sample *pb.Sample
		switch {
		case in.Odometry != nil:
			sample = convert.OdometryToProto(in.Odometry)
			fmt.Fprintf(truth, "%d,%g,%g,%g\n", in.Odometry.StampNs, in.Truth.X, in.Truth.Y, in.Truth.Heading)
		case in.Heading != nil:
			sample = convert.HeadingToProto(in.Heading)
		default:
			sample = convert.FixToProto(in.Fix)
		}
		if alter != nil {
			alter(sample)
		}
		resp, taken := convert.Take(fr, sample, 0)
		if !taken {
			continue
		}
		if err := j.AddPair(&pb.JournalInput{Sequence: resp.GetSequence(), Sample: sample}, &pb.JournalOutput{Response: resp}); err != nil {
			t.Fatal(err)
		}
		if resp.GetSequence()%512 == 0 {
			if _, err := j.Flush(); err != nil {
				t.Fatal(err)
			}
		}
	}
	// Close keeps what was flushed (journal's TestCloseDropsUnflushed):
	// without this flush, up to 511 of the run's last inputs were left out
	// of its journal, and the tests reviewed less than they said.
	if _, err := j.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := j.Close(); err != nil {
		t.Fatal(err)
	}
	if err := truth.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := tf.Close(); err != nil {
		t.Fatal(err)
	}
	return dir, tp
}

func TestReviewOfASimulatedRun(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Counts: true, Seed: 71, DurationS: 40, OutlierFraction: 0.05, CameraHz: 4})
	out := t.TempDir()
	run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, out, Options{})
	if err != nil {
		t.Fatal(err)
	}
	s := run.Summary
	t.Logf("RMS filtered %.4f m, smoothed %.4f m; NEES median %.2f / %.2f", s.FilteredRMSM, s.SmoothedRMSM, s.FilteredNEESMedian, s.SmoothedNEESMedian)
	if !s.HasTruth || s.SmoothedRMSM >= s.FilteredRMSM {
		t.Errorf("smoothed RMS %.4f m is not below filtered %.4f m", s.SmoothedRMSM, s.FilteredRMSM)
	}
	if s.DistanceM < 10 || s.Fixes["applied"] < 100 || s.Fixes["gated"] == 0 || s.Inputs < 10000 {
		t.Errorf("summary %+v", s)
	}
	if s.Truncated != "" {
		t.Errorf("an intact journal reported as truncated: %s", s.Truncated)
	}
	for _, p := range []string{run.FilteredCSV, run.SmoothedCSV} {
		f, _ := os.Open(p)
		rows, err := csv.NewReader(f).ReadAll()
		f.Close()
		if err != nil || len(rows) < 8000 || rows[0][0] != "stamp_ns" || len(rows[1]) != len(csvHeader) {
			t.Errorf("%s: %d rows, %v", p, len(rows), err)
		}
	}
	var txt bytes.Buffer
	WriteText(&txt, run)
	for _, want := range []string{"distance:", "NIS of camera:", "95% position radius:", "do-not-trust intervals:", "error against truth:"} {
		if !strings.Contains(txt.String(), want) {
			t.Errorf("summary lacks %q:\n%s", want, txt.String())
		}
	}
}

// TestReviewOfATruncatedJournal: a journal cut by a crash gives a report of
// what was recovered and says so.
func TestReviewOfATruncatedJournal(t *testing.T) {
	dir, _ := writeRun(t, fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, Seed: 72, DurationS: 10})
	seg := journal.SegmentPath(dir, "cart", 0)
	b, _ := os.ReadFile(seg)
	os.WriteFile(seg, b[:len(b)*2/3+5], 0o644)
	run, err := Analyze(Source{JournalDir: dir, Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(run.Summary.Truncated, "truncated") || run.Summary.Inputs == 0 {
		t.Fatalf("truncation not reported: %+v", run.Summary)
	}
	var html bytes.Buffer
	if err := WriteHTML(&html, "truncated", run); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(html.String(), "class=\"note\"") || !strings.Contains(html.String(), "truncated") {
		t.Errorf("the report does not say the journal was truncated")
	}
}

// TestReviewGoesOnPastDamage: bytes flipped in the middle of a journal cost
// the inputs in the damaged frame; the review says where, reviews the run on
// both sides of the gap, and leaves the journal's directory as it was (a
// reader copies nothing aside).
func TestReviewGoesOnPastDamage(t *testing.T) {
	dir, _ := writeRun(t, fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, Seed: 72, DurationS: 10})
	seg := journal.SegmentPath(dir, "cart", 0)
	b, _ := os.ReadFile(seg)
	for i := len(b) / 2; i < len(b)/2+16; i++ {
		b[i] ^= 0x5a
	}
	os.WriteFile(seg, b, 0o644)
	before, _ := os.ReadDir(dir)
	intact, err := Analyze(Source{JournalDir: dir, Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	after, _ := os.ReadDir(dir)
	if len(after) != len(before) {
		t.Errorf("the review changed the journal's directory: %d entries, then %d", len(before), len(after))
	}
	if len(intact.Summary.Gaps) == 0 || !strings.Contains(intact.Summary.Gaps[0], "journal gap") {
		t.Fatalf("the gap is not reported: %+v", intact.Summary.Gaps)
	}
	dirOK, _ := writeRun(t, fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, Seed: 72, DurationS: 10})
	whole, err := Analyze(Source{JournalDir: dirOK, Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if n, all := intact.Summary.Inputs, whole.Summary.Inputs; n < all*9/10 || n >= all {
		t.Errorf("%d of %d inputs reviewed past the damage", n, all)
	}
	var text bytes.Buffer
	if err := WriteText(&text, intact); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(text.String(), "goes on past it") {
		t.Errorf("the summary does not mention the gap:\n%s", text.String())
	}
}

// TestReportInABrowser opens the HTML report in headless Chromium (Debian's
// package, which .ci/run installs), checks that every figure is present and
// drawn with a non-zero size, and saves a screenshot in testdata/out.
func TestReportInABrowser(t *testing.T) {
	browser, err := exec.LookPath("chromium")
	if err != nil {
		if os.Getenv("CI") != "" {
			t.Fatal("chromium is not installed; .ci/run installs it")
		}
		t.Skip("chromium is not installed")
	}
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 73, DurationS: 30, OutlierFraction: 0.1, Bump: &fusiontest.Bump{AtS: 18, DXM: 0.8}})
	out := t.TempDir()
	run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, out, Options{})
	if err != nil {
		t.Fatal(err)
	}
	report := filepath.Join(out, "report.html")
	f, _ := os.Create(report)
	if err := WriteHTML(f, "Review of robots/cart", run); err != nil {
		t.Fatal(err)
	}
	f.Close()
	args := []string{"--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
		"--disable-component-update", "--disable-sync", "--user-data-dir=" + t.TempDir(), "--window-size=1300,2400"}
	dom := runChromium(t, browser, append(args, "--dump-dom", "file://"+report)...)
	m := regexp.MustCompile(`data-figures="([^"]*)"`).FindSubmatch(dom)
	if m == nil {
		t.Fatalf("the page did not mark its figures; DOM starts %.300s", dom)
	}
	sizes := map[string][2]int{}
	for _, f := range strings.Fields(string(m[1])) {
		id, wh, _ := strings.Cut(f, ":")
		w, h, _ := strings.Cut(wh, "x")
		wi, _ := strconv.Atoi(w)
		hi, _ := strconv.Atoi(h)
		sizes[id] = [2]int{wi, hi}
	}
	for _, id := range []string{"fig-track-0", "fig-position-std-0", "fig-heading-std-0", "fig-nis-camera-0", "fig-nis-imu-0", "fig-imu-offset-0"} {
		if s, ok := sizes[id]; !ok || s[0] < 100 || s[1] < 50 {
			t.Errorf("figure %s: size %v in the browser (all: %v)", id, s, sizes)
		}
	}
	shot, _ := filepath.Abs("../../testdata/out/review-report.png")
	os.MkdirAll(filepath.Dir(shot), 0o755)
	runChromium(t, browser, append(args, "--screenshot="+shot, "file://"+report)...)
	if st, err := os.Stat(shot); err != nil || st.Size() < 10000 {
		t.Fatalf("screenshot %s: %v", shot, err)
	}
	t.Logf("screenshot of the report: %s", shot)
}

// TestSpillToDisk: a review whose steps exceed the memory budget keeps them
// on disk and gives the same result as one in memory.
func TestSpillToDisk(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 75, DurationS: 20, OutlierFraction: 0.05})
	mem, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	disk, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{MemoryBytes: 10 * stepMemBytes, TempDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	a, _ := os.ReadFile(mem.SmoothedCSV)
	b, _ := os.ReadFile(disk.SmoothedCSV)
	if len(a) < 1000 || !bytes.Equal(a, b) {
		t.Errorf("smoothed tracks differ between memory and disk (%d and %d bytes)", len(a), len(b))
	}
	if mem.Summary.SmoothedRMSM != disk.Summary.SmoothedRMSM {
		t.Errorf("RMS %v vs %v", mem.Summary.SmoothedRMSM, disk.Summary.SmoothedRMSM)
	}
}

// TestStoredGains: the smoothed track is the same to the bit whether the
// step writer stored every gain with the steps on disk, none, or some
// (estimator.RTSGain then RTSStepWithGain is RTSStep), and the same as a
// review kept in memory.
func TestStoredGains(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 76, DurationS: 20, OutlierFraction: 0.05})
	mem, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	want, _ := os.ReadFile(mem.SmoothedCSV)
	defer func(w func(int) bool) { writerGains = w }(writerGains)
	turn := 0
	for name, policy := range map[string]func(int) bool{
		"every": func(int) bool { return true },
		"none":  func(int) bool { return false },
		"some":  func(int) bool { turn++; return turn%3 == 0 },
	} {
		writerGains = policy
		disk, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{MemoryBytes: 10 * stepMemBytes, TempDir: t.TempDir()})
		if err != nil {
			t.Fatal(err)
		}
		got, _ := os.ReadFile(disk.SmoothedCSV)
		if len(want) < 1000 || !bytes.Equal(got, want) {
			t.Errorf("%s gains stored: the smoothed track differs from the one in memory (%d and %d bytes)", name, len(got), len(want))
		}
	}
}

// TestSpillToDiskWithoutIMU: the disk's step records hold a three-state
// run (no IMU offset) as well, bit for bit.
func TestSpillToDiskWithoutIMU(t *testing.T) {
	dir, _ := writeRun(t, fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, Seed: 80, DurationS: 15, OutlierFraction: 0.05})
	mem, err := Analyze(Source{JournalDir: dir, Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	disk, err := Analyze(Source{JournalDir: dir, Robot: "cart"}, t.TempDir(), Options{MemoryBytes: 10 * stepMemBytes, TempDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	if mem.Filtered[0].State.Size() != 3 {
		t.Fatalf("the run has %d states, want 3", mem.Filtered[0].State.Size())
	}
	a, _ := os.ReadFile(mem.SmoothedCSV)
	b, _ := os.ReadFile(disk.SmoothedCSV)
	if len(a) < 1000 || !bytes.Equal(a, b) {
		t.Errorf("smoothed tracks differ between memory and disk (%d and %d bytes)", len(a), len(b))
	}
}

// TestTruthTapeOrFile: the walk after the smoother reads the truth the
// filtered walk kept on its tape; where the tape cannot be kept (its
// directory missing) it reads the truth file again, with the same
// smoothed errors and figures.
func TestTruthTapeOrFile(t *testing.T) {
	dir, truth := writeRun(t, fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, IMU: true, Seed: 78, DurationS: 15, OutlierFraction: 0.05})
	tape, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{TempDir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	file, err := Analyze(Source{JournalDir: dir, Robot: "cart", Truth: truth}, t.TempDir(), Options{TempDir: filepath.Join(t.TempDir(), "missing")})
	if err != nil {
		t.Fatal(err)
	}
	a, b := tape.Summary, file.Summary
	if !a.HasTruth || a.TruthMatched < 1000 || a.SmoothedRMSM != b.SmoothedRMSM || a.SmoothedNEES != b.SmoothedNEES || a.SmoothedNEESMedian != b.SmoothedNEESMedian || a.SmoothedInside95 != b.SmoothedInside95 {
		t.Errorf("smoothed against truth: tape %+v, file %+v", a, b)
	}
	if len(tape.Truth) != len(file.Truth) || len(tape.Truth) == 0 {
		t.Fatalf("%d and %d truth points", len(tape.Truth), len(file.Truth))
	}
	for i := range tape.Truth {
		if p, q := tape.Truth[i], file.Truth[i]; p != q && !(math.IsNaN(p.X) && math.IsNaN(q.X)) {
			t.Fatalf("truth point %d: %v from the tape, %v from the file", i, p, q)
		}
	}
}

// TestReviewMapCheck: the cart drives among 16 aisle markers each 3 cm off
// its map; reviewed with the map's survey error declared (Override), the
// summary's map check names the markers whose offset the recording shows
// beyond its 99% region, each offset within four of its standard
// deviations of the simulator's truth (fusiontest's MarkerOffset), and the
// text says so. Reviewed with the map taken as exact, it has no map check.
func TestReviewMapCheck(t *testing.T) {
	sc := fusiontest.Scenario{Layout: fusiontest.DriveWheelTurn, IMU: true, MarkerCount: 16, Seed: 74, DurationS: 60,
		Errors: fusiontest.Errors{LandmarkSurveyM: 0.03}}
	dir, _ := writeRun(t, sc)
	sim := fusiontest.New(sc)
	for _, ok := sim.Next(); ok; _, ok = sim.Next() {
	}
	cfg := sim.Config()
	cfg.LandmarkPositionStdM = 0.03
	run, err := Analyze(Source{JournalDir: dir, Robot: "cart", Override: convert.ConfigToProto(cfg)}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	s := run.Summary
	t.Logf("map check: %d of %d markers off", len(s.MarkersOff), s.MarkersSeen)
	if s.MarkersSeen < 8 || len(s.MarkersOff) == 0 {
		t.Fatalf("map check of %d markers, %d off; want most of the 16 seen and some off", s.MarkersSeen, len(s.MarkersOff))
	}
	for _, o := range s.MarkersOff {
		dx, dy, ok := sim.MarkerOffset(o.ID)
		if !ok {
			t.Fatalf("%s named off the map, but the camera never saw it", o.ID)
		}
		if math.Abs(o.DXM-dx) > 4*math.Sqrt(o.Cov[0]) || math.Abs(o.DYM-dy) > 4*math.Sqrt(o.Cov[3]) {
			t.Errorf("%s: found (%+.3f, %+.3f) m, sd (%.3f, %.3f); true (%+.3f, %+.3f)", o.ID, o.DXM, o.DYM, math.Sqrt(o.Cov[0]), math.Sqrt(o.Cov[3]), dx, dy)
		}
	}
	var txt bytes.Buffer
	WriteText(&txt, run)
	if !strings.Contains(txt.String(), "map check:") || !strings.Contains(txt.String(), s.MarkersOff[0].ID+" by (") {
		t.Errorf("the summary does not name the markers off the map:\n%s", txt.String())
	}
	f, err := os.Open(run.MarkersCSV)
	if err != nil {
		t.Fatal(err)
	}
	rows, err := csv.NewReader(f).ReadAll()
	f.Close()
	if err != nil || len(rows) != s.MarkersSeen+1 || len(rows[0]) != 11 {
		t.Fatalf("%s: %d rows (%v), want a header and %d markers of 11 columns", run.MarkersCSV, len(rows), err, s.MarkersSeen)
	}
	off := 0
	for _, r := range rows[1:] {
		if r[10] == "true" {
			off++
		}
	}
	if off != len(s.MarkersOff) {
		t.Errorf("%d markers marked off the map in the export, %d in the summary", off, len(s.MarkersOff))
	}
	exact, err := Analyze(Source{JournalDir: dir, Robot: "cart"}, t.TempDir(), Options{})
	if err != nil {
		t.Fatal(err)
	}
	if exact.Summary.MarkersSeen != 0 {
		t.Errorf("a map check (%d markers) without landmark blocks", exact.Summary.MarkersSeen)
	}
}
