package main

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"math"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"reckon.example/fusion"
	"reckon.example/fusion/fusiontest"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// writeRun writes a simulated run of the greenhouse cart (free wheels with
// 16-bit counts, an absolute IMU, a pose camera whose fixes carry no
// covariance of their own) as JSON Lines, and its truth as CSV.
func writeRun(t *testing.T, samples, truth string, seconds float64) {
	t.Helper()
	s := fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 5, IMU: true, Counts: true, DurationS: seconds, SensorCovariance: true})
	writeSim(t, s, samples, truth)
}

// writeSim writes a simulated run's samples as JSON Lines in arrival order
// to samples, and its truth at every odometry sample as CSV to truth.
func writeSim(t *testing.T, s *fusiontest.Sim, samples, truth string) {
	t.Helper()
	fs, err := os.Create(samples)
	if err != nil {
		t.Fatal(err)
	}
	ft, err := os.Create(truth)
	if err != nil {
		t.Fatal(err)
	}
	ws, wt := bufio.NewWriter(fs), bufio.NewWriter(ft)
	fmt.Fprintln(wt, "stamp_ns,x_m,y_m,heading_rad")
	for {
		in, ok := s.Next()
		if !ok {
			break
		}
		switch {
		case in.Odometry != nil:
			err = convert.WriteJSONLine(ws, convert.OdometryToProto(in.Odometry))
			fmt.Fprintf(wt, "%d,%.9g,%.9g,%.9g\n", in.Odometry.StampNs, in.Truth.X, in.Truth.Y, in.Truth.Heading)
		case in.Heading != nil:
			err = convert.WriteJSONLine(ws, convert.HeadingToProto(in.Heading))
		default:
			err = convert.WriteJSONLine(ws, convert.FixToProto(in.Fix))
		}
		if err != nil {
			t.Fatal(err)
		}
	}
	for _, c := range []interface{ Flush() error }{ws, wt} {
		if err := c.Flush(); err != nil {
			t.Fatal(err)
		}
	}
	fs.Close()
	ft.Close()
}

// TestTune runs the command on a simulated minute whose configuration has
// the wheels' noise three times too large (7.5e-5 m^2/m against the
// simulator's 2.5e-5, fusiontest's Config): the new configuration, written
// beside the input, which it leaves as it was, has the wheels' noise
// within 40% of the truth (a minute determines it to about 10% standard
// error), names every change in its first line, and loads; the summary
// has the table, the consistency before and after and, with -truth, the
// NEES. The unused second sensor (post-camera, no fixes) is reported as
// not determined and kept.
func TestTune(t *testing.T) {
	dir := t.TempDir()
	samples, truth := filepath.Join(dir, "run.jsonl"), filepath.Join(dir, "truth.csv")
	writeRun(t, samples, truth, 60)
	orig, err := os.ReadFile(exampleConfig)
	if err != nil {
		t.Fatal(err)
	}
	input := strings.Replace(string(orig), "wheel_var_m2_per_m: 2.5e-5", "wheel_var_m2_per_m: 7.5e-5", 1)
	config := filepath.Join(dir, "cart.yaml")
	if err := os.WriteFile(config, []byte(input), 0o644); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	stdout, stderr, code := runCode(t, ctx, "", "tune", "-config", config, "-samples", samples, "-truth", truth)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	out := filepath.Join(dir, "cart-tuned.yaml")
	for _, want := range []string{"noise.wheel_var_m2_per_m", "95% interval", "observed Fisher information", "mean NIS before",
		"sensors[1].covariance", "no: ", "NEES against the truth", "wrote " + out} {
		if !strings.Contains(stdout, want) {
			t.Errorf("output lacks %q:\n%s", want, stdout)
		}
	}
	if b, _ := os.ReadFile(config); string(b) != input {
		t.Error("the input configuration changed")
	}
	data, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	_, cfg, err := convert.LoadConfigYAML(data)
	if err != nil {
		t.Fatalf("the new configuration: %v\n%s", err, data)
	}
	if first, _, _ := strings.Cut(string(data), "\n"); !strings.HasPrefix(first, "# reckon tune: ") || !strings.Contains(first, "noise.wheel_var_m2_per_m 7.5e-5 -> ") ||
		!strings.Contains(first, "kept: ") {
		t.Errorf("first line %q", first)
	}
	if _, k, _ := strings.Cut(first(data), "kept: "); !strings.Contains(k, "sensors[1].covariance") {
		t.Errorf("the unused sensor's covariance is not among the levels kept: %q", first(data))
	}
	// The IMU offset's walk, which a minute does not determine, at the upper
	// end of its interval, and the file says so.
	if !strings.Contains(stdout, "noise.imu_offset_var_rad2_per_s") || !strings.Contains(string(data), "not determined by the run: the upper end of its 95% likelihood interval") ||
		!(cfg.Noise.IMUOffsetVarRad2PerS > 1e-7) {
		t.Errorf("the offset's walk %.3g not raised from 1e-7 to the upper end of its interval, or the file does not say so:\n%s", cfg.Noise.IMUOffsetVarRad2PerS, data)
	}
	if w := cfg.Noise.WheelVarM2PerM; math.Abs(w/2.5e-5-1) > 0.4 {
		t.Errorf("wheel_var_m2_per_m %.3g, truth 2.5e-5: more than 40%% off\n%s", w, stdout)
	}

	for _, c := range []struct {
		name string
		args []string
		code int
	}{
		{"out exists", []string{"tune", "-config", config, "-samples", samples}, exitRefused},
		{"out exists, the run as the last argument", []string{"tune", "-config", config, samples}, exitRefused},
		{"two runs", []string{"tune", "-config", config, "-out", filepath.Join(dir, "z.yaml"), "-samples", samples, samples}, exitUsage},
		{"samples without config", []string{"tune", "-out", filepath.Join(dir, "z.yaml"), "-samples", samples}, exitUsage},
		{"journal without robot (flag)", []string{"tune", "-config", config, "-out", filepath.Join(dir, "y.yaml"), "-journal", dir}, exitUsage},
		{"out is the input", []string{"tune", "-config", config, "-out", config, "-force", samples}, exitUsage},
		{"journal without robot", []string{"tune", "-config", config, "-out", filepath.Join(dir, "y.yaml"), dir}, exitUsage},
		{"no such run", []string{"tune", "-config", config, "-out", filepath.Join(dir, "x.yaml"), filepath.Join(dir, "none.jsonl")}, exitFailure},
	} {
		if _, stderr, code := runCode(t, ctx, "", c.args...); code != c.code {
			t.Errorf("%s: exit %d, want %d: %s", c.name, code, c.code, stderr)
		}
	}
}

// first returns the first line of a file's data.
func first(data []byte) string {
	line, _, _ := strings.Cut(string(data), "\n")
	return line
}

// TestTuneIMULatency: tune -model finds the latency of an IMU that stamps
// its headings 40 ms after reading them (fusiontest's IMUStampLateNs) from
// a simulated minute, to the 5 ms of its grid, says so, and writes it to
// the new configuration, which loads (calib's TestIMULatencyChoice has the
// method).
func TestTuneIMULatency(t *testing.T) {
	dir := t.TempDir()
	samples, truth := filepath.Join(dir, "run.jsonl"), filepath.Join(dir, "truth.csv")
	writeSim(t, fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 5, IMU: true, Counts: true, DurationS: 60, SensorCovariance: true,
		Errors: fusiontest.Errors{IMUStampLateNs: 40e6}}), samples, truth)
	out := filepath.Join(dir, "tuned.yaml")
	stdout, stderr, code := runCode(t, context.Background(), "", "tune", "-model", "-config", exampleConfig, "-samples", samples, "-out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	if !strings.Contains(stdout, "imu_latency_ns 0 -> ") {
		t.Errorf("the summary does not name the latency chosen:\n%s", stdout)
	}
	_, cfg := readConfigFile(t, out)
	if d := cfg.IMULatencyNs - 40e6; d < -5e6 || d > 5e6 {
		t.Errorf("imu_latency_ns %d, want 40 ms within 5 ms\n%s", cfg.IMULatencyNs, stdout)
	}
}

// TestTuneAndCalibrateTakeOneRun: a recording of two runs (the controller
// restarted: a run start, then samples on a new clock) is tuned and
// calibrated one run at a time, as review reviews it: run 1 by default,
// -run N for another, each giving the table the run alone gives, and the
// output says which of how many runs it covers. Both read every run as
// one: the second run's samples, on the restarted clock, went into the
// first run's fit (tune fitted the camera's covariance 660 times too
// large on the README's reboot example) and the run start was counted as
// a reseed left out.
func TestTuneAndCalibrateTakeOneRun(t *testing.T) {
	dir := t.TempDir()
	one, two, both := filepath.Join(dir, "one.jsonl"), filepath.Join(dir, "two.jsonl"), filepath.Join(dir, "both.jsonl")
	writeRun(t, one, filepath.Join(dir, "truth1.csv"), 20)
	writeSim(t, fusiontest.New(fusiontest.Scenario{Layout: fusiontest.FreeWheelTurn, Seed: 6, IMU: true, Counts: true, DurationS: 20, SensorCovariance: true}), two, filepath.Join(dir, "truth2.csv"))
	a, _ := os.ReadFile(one)
	b, _ := os.ReadFile(two)
	if err := os.WriteFile(both, append(append(a, []byte("{\"run_start\":{\"boot_id\":\"boot-2\"}}\n")...), b...), 0o644); err != nil {
		t.Fatal(err)
	}
	// table keeps the lines of a command's output from its table to the
	// file written (which names the file).
	table := func(out, first string) string {
		i := strings.Index(out, first)
		if i < 0 {
			t.Fatalf("no %q in:\n%s", first, out)
		}
		out = out[i:]
		if j := strings.Index(out, "\nwrote "); j >= 0 {
			out = out[:j]
		}
		return out
	}
	ctx := context.Background()
	for _, c := range []struct {
		cmd, run, alone, first string
	}{
		{"tune", "", one, "log-likelihood"},
		{"tune", "2", two, "log-likelihood"},
		{"calibrate", "", one, "wiring:"},
		{"calibrate", "2", two, "wiring:"},
	} {
		args := []string{c.cmd, "-config", exampleConfig, "-samples", both, "-out", filepath.Join(dir, "new.yaml"), "-force"}
		if c.run != "" {
			args = append(args, "-run", c.run)
		}
		got, errs, _ := runCode(t, ctx, "", args...)
		want, _, _ := runCode(t, ctx, "", c.cmd, "-config", exampleConfig, "-samples", c.alone, "-out", filepath.Join(dir, "alone.yaml"), "-force")
		run := max(c.run, "1")
		if !strings.Contains(got, "run "+run+" of 2 runs") {
			t.Errorf("%s -run %q: the output does not say it covers run %s of 2:\n%s%s", c.cmd, c.run, run, got, errs)
		}
		if g, w := table(got, c.first), table(want, c.first); g != w {
			t.Errorf("%s -run %q: the two runs' recording gives\n%s\nthe run alone\n%s", c.cmd, c.run, g, w)
		}
	}
	if _, errs, code := runCode(t, ctx, "", "tune", "-config", exampleConfig, "-samples", both, "-out", filepath.Join(dir, "new.yaml"), "-force", "-run", "3"); code != exitUsage || !strings.Contains(errs, "runs 1 to 2") {
		t.Errorf("tune -run 3 of 2 runs: exit %d, stderr %q", code, errs)
	}
}

// TestTuneAndCalibrateSayATornJournal: a journal cut short (a crash, or a
// copy of it taken half way) is tuned and calibrated on the inputs before
// the cut, and both say so, as replay and review do; they said nothing,
// the fit quietly on part of the run.
func TestTuneAndCalibrateSayATornJournal(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	seg := journal.SegmentPath(dir, "cart", 0)
	st, err := os.Stat(seg)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.Truncate(seg, st.Size()*2/3); err != nil {
		t.Fatal(err)
	}
	for _, cmd := range []string{"tune", "calibrate"} {
		out, errs, _ := runCode(t, context.Background(), "", cmd, "-journal", dir, "-robot", "cart", "-out", filepath.Join(t.TempDir(), "new.yaml"))
		if !strings.Contains(out, "the journal is truncated") {
			t.Errorf("%s of a torn journal does not say so:\n%s%s", cmd, out, errs)
		}
	}
}

// TestTuneAndCalibrateGoPastAGap: bytes flipped in the middle of a
// journal cost the inputs of the damaged frames; tune and calibrate name
// the gap, go on past it as review, replay and export do, and write the
// configuration that the inputs left give when read from a file of
// samples (replay -format samples, which goes past the gap too): the
// same lines, comments aside. Before, both stopped at the gap with exit
// 1, so that a day's recording with one damaged frame could not be
// calibrated or tuned at all.
func TestTuneAndCalibrateGoPastAGap(t *testing.T) {
	dir, _, _ := writeExampleJournal(t)
	seg := journal.SegmentPath(dir, "cart", 0)
	b, err := os.ReadFile(seg)
	if err != nil {
		t.Fatal(err)
	}
	for i := len(b) / 2; i < len(b)/2+16; i++ {
		b[i] ^= 0x5a
	}
	if err := os.WriteFile(seg, b, 0o644); err != nil {
		t.Fatal(err)
	}
	left := filepath.Join(t.TempDir(), "left.jsonl")
	if _, errs, code := runCode(t, context.Background(), "", "replay", "-journal", dir, "-robot", "cart", "-format", "samples", "-out", left); code != exitFailure || !strings.Contains(errs, "journal gap") {
		t.Fatalf("replay of the damaged journal: exit %d, want %d naming the gap:\n%s", code, exitFailure, errs)
	}
	// settings is the configuration a file gives a robot, its defaults
	// filled in (one file writes them, the other leaves them out).
	settings := func(path string) fusion.Config {
		b, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		_, c, err := convert.LoadConfigYAML(b)
		if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		fr, err := fusion.New(c)
		if err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		return fr.Config()
	}
	for _, cmd := range []string{"tune", "calibrate"} {
		fromJournal := filepath.Join(t.TempDir(), "new.yaml")
		out, errs, code := runCode(t, context.Background(), "", cmd, "-journal", dir, "-robot", "cart", "-out", fromJournal)
		if code != 0 || !strings.Contains(out, "note: journal gap") || !strings.Contains(out, "the inputs lost are left out") {
			t.Errorf("%s of a journal with a gap: exit %d, want 0 with the gap named:\n%s%s", cmd, code, out, errs)
			continue
		}
		fromSamples := filepath.Join(t.TempDir(), "new.yaml")
		if _, errs, code := runCode(t, context.Background(), "", cmd, "-config", exampleConfig, "-samples", left, "-out", fromSamples); code != 0 {
			t.Fatalf("%s of the samples left: exit %d\n%s", cmd, code, errs)
		}
		if a, b := settings(fromJournal), settings(fromSamples); !reflect.DeepEqual(a, b) {
			t.Errorf("%s: the journal past its gap gives\n%+v\nthe samples left\n%+v", cmd, a, b)
		}
	}
}

// TestReadTruthCSV: the truth file of tune and calibrate is read as review
// reads it: a header only first (a byte order mark before it skipped),
// then rows of an integer stamp and three finite numbers, a row that is
// not one an error naming its line (input refused). Short rows and a
// stamp that is no integer after the first line were skipped as headers
// without a word: a file with its heading column missing, or a row cut
// short, lost rows silently.
func TestReadTruthCSV(t *testing.T) {
	dir := t.TempDir()
	for _, c := range []struct {
		name, text, want string
		rows             int
	}{
		{"good", "\ufeffstamp_ns,x_m,y_m,heading_rad\n20,1,2,0.5\n10,0,0,0\n", "", 2},
		{"no header", "10,0,0,0\n20,1,2,0.5\n", "", 2},
		{"short row", "stamp_ns,x_m,y_m,heading_rad\n10,0,0,0\n20,1,2\n30,1,2,3\n", ":3: refused: 3 fields", 0},
		{"stamp in seconds", "stamp_ns,x_m,y_m,heading_rad\n0.01,0,0,0\n", `:2: refused: stamp_ns "0.01" is not an integer`, 0},
		{"NaN", "stamp_ns,x_m,y_m,heading_rad\n10,0,NaN,0\n", ":2: refused: column 3 is not a finite number", 0},
		{"header only", "stamp_ns,x_m,y_m,heading_rad\n", "no truth rows", 0},
	} {
		path := filepath.Join(dir, "truth.csv")
		if err := os.WriteFile(path, []byte(c.text), 0o644); err != nil {
			t.Fatal(err)
		}
		rows, err := readTruthCSV(path)
		switch {
		case c.want == "" && (err != nil || len(rows) != c.rows || rows[0].StampNs != 10):
			t.Errorf("%s: %d rows, %v; want %d sorted", c.name, len(rows), err, c.rows)
		case c.want != "" && (err == nil || !strings.Contains(err.Error(), path) || !strings.Contains(err.Error(), c.want) || exitCode(err) != exitRefused):
			t.Errorf("%s: %v (exit %d); want %q, exit %d", c.name, err, exitCode(err), c.want, exitRefused)
		}
	}
}

// TestTuneWithoutOdometry: a recording of IMU headings alone (the
// odometry left out of the file) has no innovations, since nothing is
// applied without odometry; tune says that, exit 5. It said the run had
// "no IMU headings and no fixes", of a file of thousands of headings.
func TestTuneWithoutOdometry(t *testing.T) {
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	var headings []string
	for _, l := range strings.Split(string(b), "\n") {
		if strings.HasPrefix(l, `{"heading"`) {
			headings = append(headings, l)
		}
	}
	if len(headings) < 100 {
		t.Fatalf("%d headings in the example", len(headings))
	}
	path := filepath.Join(t.TempDir(), "headings.jsonl")
	if err := os.WriteFile(path, []byte(strings.Join(headings, "\n")+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	_, errs, code := runCode(t, context.Background(), "", "tune", "-config", exampleConfig, "-samples", path, "-out", filepath.Join(t.TempDir(), "new.yaml"))
	if code != exitRefused || !strings.Contains(errs, "no IMU heading or fix was applied") {
		t.Errorf("tune of headings alone: exit %d, want %d\n%s", code, exitRefused, errs)
	}
}

// TestNewConfigNeverOverwritesTheRecording: imu-noise, tune and calibrate
// refuse an -out that names the recording they read (exit 2), -force or
// not, and leave it as it was: with -force they wrote the new YAML
// configuration over the recording.
func TestNewConfigNeverOverwritesTheRecording(t *testing.T) {
	dir := t.TempDir()
	samples := filepath.Join(dir, "run.jsonl")
	b, err := os.ReadFile(exampleSamples)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(samples, b, 0o644); err != nil {
		t.Fatal(err)
	}
	for _, args := range [][]string{
		{"imu-noise", samples, "-config", exampleConfig, "-out", samples, "-force"},
		{"tune", "-config", exampleConfig, "-samples", samples, "-out", samples, "-force"},
		{"calibrate", "-config", exampleConfig, "-samples", samples, "-out", samples, "-force"},
	} {
		_, errs, code := runCode(t, context.Background(), "", args...)
		if code != exitUsage || !strings.Contains(errs, "never overwritten") {
			t.Errorf("%s -out the recording: exit %d, want %d\n%s", args[0], code, exitUsage, errs)
		}
		if got, _ := os.ReadFile(samples); string(got) != string(b) {
			t.Fatalf("%s -out the recording -force overwrote it: %.100q", args[0], got)
		}
	}
}

// TestTuneAndCalibrateReadAllPastAGap: a journal that lost inputs in its
// middle to damaged bytes is tuned and calibrated on every input it still
// holds (readRun keeps as many as the journal's own reading), as replay and
// review go past such a gap, and both name the gap. Before, both stopped
// at it with exit 1, "journal gap: ...", and fitted nothing.
func TestTuneAndCalibrateReadAllPastAGap(t *testing.T) {
	dir, samples, _ := writeExampleJournal(t)
	flipBytes(t, journal.SegmentPath(dir, "cart", 0), func(size int) (int, int) { return size / 3, size/3 + 200 }, 0x5a)
	var kept int
	_, err := journal.Read(dir, "cart", journal.Visitor{ReadOnly: true, Gap: func(error) error { return nil }, Pair: func(*pb.JournalInput, *pb.JournalOutput) error {
		kept++
		return nil
	}})
	if !errors.Is(err, journal.ErrGap) || kept < len(samples)/2 || kept >= len(samples) {
		t.Fatalf("the damaged journal: %d of %d inputs, %v; want a gap", kept, len(samples), err)
	}
	rec, err := readRun(context.Background(), dir, "cart", nil, 1)
	if err != nil || len(rec.inputs)+rec.skipped != kept {
		t.Fatalf("readRun: %v; want the %d inputs kept", err, kept)
	}
	for _, cmd := range []string{"tune", "calibrate"} {
		out := filepath.Join(t.TempDir(), "new.yaml")
		stdout, stderr, code := runCode(t, context.Background(), "", cmd, "-journal", dir, "-robot", "cart", "-out", out)
		if _, err := os.Stat(out); code != exitOK || err != nil || !strings.Contains(stdout, "journal gap") || !strings.Contains(stdout, "the inputs after it are used") {
			t.Errorf("%s of a journal with a gap: exit %d, %v; want exit 0, %s written and the gap named\n%s%s", cmd, code, err, out, stdout, stderr)
		}
	}
}

// TestInterruptibleEndsWithContext: a fit that does not return (as a
// calibrate of a long run ran on for 37 minutes after SIGTERM: the probe
// of session 26) gives way to the end of the command's context, which
// Ctrl-C and SIGTERM end: interruptible returns context.Canceled while
// the fit still runs (were it to wait for the fit, the test would hang
// until go test's timeout). A fit that ends gives its result and error.
func TestInterruptibleEndsWithContext(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	release, started := make(chan struct{}), make(chan struct{})
	defer close(release)
	go func() {
		<-started
		cancel()
	}()
	if _, err := interruptible(ctx, func() (int, error) {
		close(started)
		<-release
		return 1, nil
	}); !errors.Is(err, context.Canceled) {
		t.Fatalf("a fit interrupted: %v, want context.Canceled", err)
	}
	want := errors.New("no fixes")
	if v, err := interruptible(context.Background(), func() (int, error) { return 7, want }); v != 7 || err != want {
		t.Errorf("a fit that ends: %d, %v; want 7, %v", v, err, want)
	}
}

// TestInterruptedNamesTheCommand: a command interrupted without a summary
// of its own (tune, calibrate) says so in one line naming itself, as every
// other failure does, and exits 130. Before, it printed "reckon:
// interrupted".
func TestInterruptedNamesTheCommand(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	out := filepath.Join(t.TempDir(), "tuned.yaml")
	for _, cmd := range []string{"tune", "calibrate"} {
		_, errs, code := runCode(t, ctx, "", cmd, "-config", exampleConfig, "-samples", exampleSamples, "-out", out)
		if code != exitInterrupted || errs != "reckon "+cmd+": interrupted\n" {
			t.Errorf("%s interrupted: exit %d, stderr %q; want %d and %q", cmd, code, errs, exitInterrupted, "reckon "+cmd+": interrupted\n")
		}
		if _, err := os.Stat(out); !errors.Is(err, os.ErrNotExist) {
			t.Errorf("%s interrupted wrote %s: %v", cmd, out, err)
		}
	}
}
