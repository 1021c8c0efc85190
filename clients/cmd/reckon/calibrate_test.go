package main

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	"reckon.example/server/convert"
)

// misSet are the README's worked example's edits of the demo's
// configuration (robot.yaml), as its sed command makes them: the right
// wheel's counts per metre 3% high, the camera's mount 3 cm forward and 2
// degrees (0.035 rad) to the left, the IMU's reading noise three times its
// variance. Each must match once, or the README's command no longer
// applies to the file the demo writes.
var misSet = [][2]string{
	{"{name: right, y_m: -0.12, counts_per_m: 40000,", "{name: right, y_m: -0.12, counts_per_m: 41200,"},
	{"mount: {x_m: 0.15}", "mount: {x_m: 0.18, heading_rad: 0.035}"},
	{"imu_heading_var_rad2: 2.5e-05", "imu_heading_var_rad2: 7.5e-05"},
}

// paramRow finds a parameter's row in calibrate's table and returns its
// fitted value, standard error and whether it is determined.
func paramRow(t *testing.T, out, name string) (fitted, se float64, determined bool) {
	t.Helper()
	m := regexp.MustCompile(`(?m)^` + regexp.QuoteMeta(name) + `\s{2,}\S+\s{2,}.+?\s{2,}-?\d+\.\d+\s{2,}(-?\d+\.\d+)\s{2,}(\d+\.\d+)\s{2,}(yes|no)`).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("no row for %s in:\n%s", name, out)
	}
	fitted, _ = strconv.ParseFloat(m[1], 64)
	se, _ = strconv.ParseFloat(m[2], 64)
	return fitted, se, m[3] == "yes"
}

// TestCalibrateWorkedExample runs the README's worked example ("Calibrating
// a robot") on a shorter demo run: the demo with its camera stamping 80 ms
// late, its configuration mis-set as misSet, then calibrate with a report,
// then tune on the calibrated configuration. The simulator's truth (the
// demo's configuration, fusiontest's Config, and the 80 ms) must lie
// within three standard errors of every fitted parameter, the bound the
// library's own TestSystematicRecoversInjectedErrors uses (its standard
// errors are about half the errors over seeds: DEVELOPERS.md, "Design:
// Systematic parameters"), plus the table's rounding to 4 decimals; the
// IMU's reading noise must lie in tune's 95% interval. The NEES against
// the truth falls from far beyond 3, the mean of a consistent 3-dof pose
// error (common practice), to near it.
func TestCalibrateWorkedExample(t *testing.T) {
	if testing.Short() {
		t.Skip("a three-minute run fitted twice")
	}
	dir := t.TempDir()
	demo := filepath.Join(dir, "demo")
	if _, errs, err := runCmd(t, "demo", "-duration", "180", "-speed", "0", "-view", "lines", "-bump-at", "0", "-camera-late", "0.08", "-journal", demo); err != nil {
		t.Fatalf("demo: %v\n%s", err, errs)
	}
	orig, err := os.ReadFile(filepath.Join(demo, "robot.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	wrong := string(orig)
	for _, e := range misSet {
		if n := strings.Count(wrong, e[0]); n != 1 {
			t.Fatalf("robot.yaml has %q %d times, want once:\n%s", e[0], n, orig)
		}
		wrong = strings.Replace(wrong, e[0], e[1], 1)
	}
	wrongPath, calPath, report := filepath.Join(dir, "cart-wrong.yaml"), filepath.Join(dir, "cart-calibrated.yaml"), filepath.Join(dir, "calibration")
	if err := os.WriteFile(wrongPath, []byte(wrong), 0o644); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	out, errs, code := runCode(t, ctx, "", "calibrate", "-journal", demo, "-robot", "greenhouse-cart", "-config", wrongPath, "-out", calPath, "-report", report)
	if code != 0 {
		t.Fatalf("calibrate: exit %d: %s\n%s", code, errs, out)
	}
	t.Logf("calibrate:\n%s", out)
	for _, c := range []struct {
		name  string
		truth float64
	}{
		{"wheels[0] (left) scale", 1},
		{"wheels[1] (right) scale", 41200.0 / 40000}, // true over reported travel
		{"sensors[0] (camera) mount.x_m", 0.15},
		{"sensors[0] (camera) mount.y_m", 0},
		{"sensors[0] (camera) mount.heading_rad", 0},
		{"sensors[0] (camera) latency", 0.08},
	} {
		fitted, se, det := paramRow(t, out, c.name)
		if !det || math.Abs(fitted-c.truth) > 3*se+0.5e-4 {
			t.Errorf("%s: fitted %.4f, se %.4f, determined %v; truth %.4f", c.name, fitted, se, det, c.truth)
		}
	}
	if !strings.Contains(out, "stamps its fixes") || !strings.Contains(out, "latency_ns") {
		t.Errorf("the sensor diagnosis did not name the late stamps")
	}
	data, err := os.ReadFile(calPath)
	if err != nil {
		t.Fatal(err)
	}
	_, cal, err := convert.LoadConfigYAML(data)
	if err != nil {
		t.Fatalf("the calibrated configuration: %v\n%s", err, data)
	}
	// The mount's standard errors go into mount_std, which the filter
	// carries as consider states (DEVELOPERS.md, "Design: Sensors").
	for i, name := range []string{"mount.x_m", "mount.y_m", "mount.heading_rad"} {
		_, se, _ := paramRow(t, out, "sensors[0] (camera) "+name)
		if got := cal.Sensors[0].MountStd[i]; math.Abs(got-se) > 0.5e-4 || got <= 0 {
			t.Errorf("sensors[0].mount_std[%d] %g, want the printed standard error %.4f", i, got, se)
		}
	}
	// The right wheel's scale of 1.03 within three standard errors moves
	// 41200 counts per metre to within 0.3% of the true 40000.
	if c := cal.Wheels[1].CountsPerM; math.Abs(c/40000-1) > 0.003 {
		t.Errorf("wheels[1].counts_per_m %.1f, truth 40000", c)
	}
	if first, _, _ := strings.Cut(string(data), "\n"); !strings.HasPrefix(first, "# reckon calibrate: ") || !strings.Contains(first, "wheels[1].counts_per_m 41200 -> ") ||
		!strings.Contains(first, "sensors[0].latency_ns 0 (default) -> ") {
		t.Errorf("first line %q", first)
	}
	if !regexp.MustCompile(`latency_ns: \d+ # from calibrate: sensors\[0\] \(camera\) latency 0\.0 ms -> \d+\.\d ms \(se \d+\.\d ms\)`).Match(data) {
		t.Errorf("the latency's comment:\n%s", data)
	}
	nees := regexp.MustCompile(`configured: mean ([0-9.]+).*\n\s*fitted:\s+mean ([0-9.]+)`).FindStringSubmatch(out)
	if nees == nil {
		t.Fatalf("no NEES in:\n%s", out)
	}
	if before, _ := strconv.ParseFloat(nees[1], 64); before < 30 {
		t.Errorf("NEES before %s: the mis-set configuration should be far from consistent", nees[1])
	}
	if after, _ := strconv.ParseFloat(nees[2], 64); after > 6 {
		t.Errorf("NEES after %s, want near 3", nees[2])
	}
	html, err := os.ReadFile(filepath.Join(report, "report.html"))
	if err != nil {
		t.Fatal(err)
	}
	for _, want := range []string{`<section id="calibration">`, `class="calibration-before"`, `class="calibration-after"`, "camera mean NIS", "mean NEES, filtered"} {
		if !strings.Contains(string(html), want) {
			t.Errorf("report lacks %q", want)
		}
	}

	tuned := filepath.Join(dir, "cart-tuned.yaml")
	out, errs, code = runCode(t, ctx, "", "tune", "-journal", demo, "-robot", "greenhouse-cart", "-config", calPath, "-out", tuned, "-truth", filepath.Join(demo, "truth.csv"))
	if code != 0 {
		t.Fatalf("tune: exit %d: %s\n%s", code, errs, out)
	}
	t.Logf("tune:\n%s", out)
	m := regexp.MustCompile(`noise\.imu_heading_var_rad2\s+rad\^2\s+7\.5e-05\s+\S+\s+\[(\S+), (\S+)\]\s+yes`).FindStringSubmatch(out)
	if m == nil {
		t.Fatalf("imu_heading_var_rad2 not determined:\n%s", out)
	}
	lo, _ := strconv.ParseFloat(m[1], 64)
	hi, _ := strconv.ParseFloat(m[2], 64)
	if !(lo <= 2.5e-5 && 2.5e-5 <= hi) {
		t.Errorf("imu_heading_var_rad2 95%% interval [%g, %g] misses the simulator's 2.5e-5", lo, hi)
	}
}

// TestCalibrateRefusals: the command's usage errors, an existing -out,
// and a run whose configuration has the wheels swapped (a wiring mistake:
// named, and nothing fitted or written).
func TestCalibrateRefusals(t *testing.T) {
	dir := t.TempDir()
	samples, truth := filepath.Join(dir, "run.jsonl"), filepath.Join(dir, "truth.csv")
	writeRun(t, samples, truth, 30)
	orig, err := os.ReadFile(exampleConfig)
	if err != nil {
		t.Fatal(err)
	}
	swapped := strings.NewReplacer("y_m: 0.12,", "y_m: -0.12,", "y_m: -0.12,", "y_m: 0.12,").Replace(string(orig))
	if swapped == string(orig) {
		t.Fatal("the example configuration has no wheels at y_m 0.12 and -0.12")
	}
	swappedPath, exists := filepath.Join(dir, "swapped.yaml"), filepath.Join(dir, "exists.yaml")
	os.WriteFile(swappedPath, []byte(swapped), 0o644)
	os.WriteFile(exists, orig, 0o644)
	ctx := context.Background()
	for _, c := range []struct {
		name string
		args []string
		code int
		want string
	}{
		{"no run", []string{"calibrate", "-out", "x.yaml"}, exitUsage, "name a run"},
		{"journal and samples", []string{"calibrate", "-journal", dir, "-robot", "cart", "-samples", samples, "-config", exampleConfig, "-out", "x.yaml"}, exitUsage, "name a run"},
		{"journal without robot", []string{"calibrate", "-journal", dir, "-out", "x.yaml"}, exitUsage, "-robot"},
		{"samples without config", []string{"calibrate", "-samples", samples, "-out", "x.yaml"}, exitUsage, "-config"},
		{"no out", []string{"calibrate", "-samples", samples, "-config", exampleConfig}, exitUsage, "-out"},
		{"out is the input", []string{"calibrate", "-samples", samples, "-config", exists, "-out", exists, "-force"}, exitUsage, "never overwritten"},
		{"out exists", []string{"calibrate", "-samples", samples, "-config", exampleConfig, "-out", exists}, exitRefused, "exists"},
		{"arguments", []string{"calibrate", "-samples", samples, "-config", exampleConfig, "-out", "x.yaml", "extra"}, exitUsage, "takes no arguments"},
		{"swapped wheels", []string{"calibrate", "-samples", samples, "-config", swappedPath, "-out", filepath.Join(dir, "new.yaml")}, exitRefused, "wiring mistake"},
	} {
		out, errs, code := runCode(t, ctx, "", c.args...)
		if code != c.code || !strings.Contains(errs, c.want) {
			t.Errorf("%s: exit %d, want %d; stderr %q lacks %q", c.name, code, c.code, errs, c.want)
		}
		if c.name == "swapped wheels" && !strings.Contains(out, "wheels[0]") {
			t.Errorf("swapped wheels: the finding does not name the wheels:\n%s", out)
		}
	}
	if _, err := os.Stat(filepath.Join(dir, "new.yaml")); err == nil {
		t.Error("a configuration was written despite the wiring mistake")
	}
	if b, _ := os.ReadFile(exists); string(b) != string(orig) {
		t.Error("an existing -out was overwritten")
	}
}

// TestCalibrateStandingStill: a run of the robot standing still in view
// of a marker determines none of the parameters (no wheel turns, no
// motion that would show a mount or a latency). Calibrate says so and
// writes nothing: it wrote a configuration whose only change was each
// mount's standard error at the fit's weak prior (1 m and 50 degrees), as
// if fitted, and exited 0.
func TestCalibrateStandingStill(t *testing.T) {
	// 30 s at 200 Hz odometry, 100 Hz IMU and 10 Hz camera: the example
	// robot at its start pose (0, 0, 0), its camera (mounted at x 0.15 m)
	// seeing itself there exactly, or with 1 cm and 5 mrad of noise,
	// seeded.
	for _, noise := range []float64{0, 1} {
		dir := t.TempDir()
		samples, out := filepath.Join(dir, "still.jsonl"), filepath.Join(dir, "new.yaml")
		rng := rand.New(rand.NewPCG(5, 5))
		var b strings.Builder
		for i := range 6000 {
			ns := int64(i) * 5e6
			fmt.Fprintf(&b, "{\"odometry\":{\"stamp_ns\":\"%d\",\"counts\":{\"counts\":[\"0\",\"0\",\"0\"]}}}\n", ns)
			if i%2 == 0 {
				fmt.Fprintf(&b, "{\"heading\":{\"stamp_ns\":\"%d\",\"heading_rad\":%g}}\n", ns, 0.7+noise*0.005*rng.NormFloat64())
			}
			if i%20 == 10 {
				fmt.Fprintf(&b, "{\"fix\":{\"stamp_ns\":\"%d\",\"sensor_id\":\"camera\",\"pose\":{\"x_m\":%g,\"y_m\":%g,\"heading_rad\":%g}}}\n",
					ns, 0.15+noise*0.01*rng.NormFloat64(), noise*0.01*rng.NormFloat64(), noise*0.005*rng.NormFloat64())
			}
		}
		if err := os.WriteFile(samples, []byte(b.String()), 0o644); err != nil {
			t.Fatal(err)
		}
		stdout, errs, code := runCode(t, context.Background(), "", "calibrate", "-config", exampleConfig, "-samples", samples, "-out", out)
		if code != exitRefused || !strings.Contains(errs, "determines none") {
			t.Errorf("noise %g: calibrate of a run standing still: exit %d, want %d; stderr %q\n%s", noise, code, exitRefused, errs, stdout)
		}
		if _, err := os.Stat(out); err == nil {
			b, _ := os.ReadFile(out)
			t.Errorf("noise %g: a configuration was written from a run that determines nothing:\n%.600s", noise, b)
		}
	}
}

// TestConfigYAML: every example configuration, written back as YAML by
// configYAML (the writer of the demo's robot.yaml and of a journal's own
// configuration), loads to the same message.
func TestConfigYAML(t *testing.T) {
	files, _ := filepath.Glob("../../../testdata/robots/*.yaml")
	if len(files) == 0 {
		t.Fatal("no example configurations")
	}
	for _, f := range files {
		data, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		want, _, err := convert.LoadConfigYAML(data)
		if err != nil {
			t.Fatal(err)
		}
		out, err := configYAML(want, "# "+f)
		if err != nil {
			t.Fatalf("%s: %v", f, err)
		}
		got, _, err := convert.LoadConfigYAML(out)
		if err != nil || !proto.Equal(got, want) {
			t.Errorf("%s: written back, loads to %v (%v), want %v\n%s", f, got, err, want, out)
		}
	}
}

// TestCalibrateJournalOwnConfig: a journal calibrated from its own
// configuration (no -config; the demo's journal without errors) writes a
// configuration that loads, says whose it was, and whose changes are
// each within a few standard errors of nothing: the demo's configuration
// is the simulator's own (fusiontest's Config), so a determined parameter
// must not move by more than 3 standard errors (as
// TestCalibrateWorkedExample), plus the table's rounding.
func TestCalibrateJournalOwnConfig(t *testing.T) {
	dir := t.TempDir()
	demo := filepath.Join(dir, "demo")
	if _, errs, err := runCmd(t, "demo", "-duration", "90", "-speed", "0", "-view", "lines", "-bump-at", "0", "-journal", demo); err != nil {
		t.Fatalf("demo: %v\n%s", err, errs)
	}
	out := filepath.Join(dir, "own.yaml")
	stdout, errs, code := runCode(t, context.Background(), "", "calibrate", "-journal", demo, "-robot", "greenhouse-cart", "-out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s\n%s", code, errs, stdout)
	}
	data, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	if _, _, err := convert.LoadConfigYAML(data); err != nil {
		t.Fatalf("%v\n%s", err, data)
	}
	if !strings.Contains(string(data), "# the configuration of greenhouse-cart in "+demo) {
		t.Errorf("the file does not say whose configuration it started from:\n%s", data)
	}
	for _, c := range []struct {
		name  string
		truth float64
	}{
		{"wheels[0] (left) scale", 1}, {"wheels[1] (right) scale", 1},
		{"sensors[0] (camera) mount.x_m", 0.15}, {"sensors[0] (camera) mount.y_m", 0}, {"sensors[0] (camera) mount.heading_rad", 0},
		{"sensors[0] (camera) latency", 0},
	} {
		fitted, se, det := paramRow(t, stdout, c.name)
		if det && math.Abs(fitted-c.truth) > 3*se+0.5e-4 {
			t.Errorf("%s: fitted %.4f, se %.4f; truth %.4f", c.name, fitted, se, c.truth)
		}
	}
}
