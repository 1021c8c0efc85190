package main

import (
	"bufio"
	"context"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/server/convert"
)

// writeStatic writes a static IMU recording: n headings at 100 Hz from a
// gyro of angle random walk arw (rad/sqrt(s)) integrated, each read with
// white noise of standard deviation q (rad), starting near pi so that the
// headings wrap.
func writeStatic(t *testing.T, path string, n int, arw, q float64) {
	t.Helper()
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	w := bufio.NewWriter(f)
	rng := rand.New(rand.NewPCG(3, 10))
	const dt = 0.01
	angle := 3.1
	for k := range n {
		angle += arw * math.Sqrt(dt) * rng.NormFloat64()
		h := &fusion.Heading{StampNs: 1_000_000_000 + int64(k)*10_000_000, HeadingRad: estimator.Wrap(angle + q*rng.NormFloat64())}
		if err := convert.WriteJSONLine(w, convert.HeadingToProto(h)); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
}

func copyFile(t *testing.T, from, to string) {
	t.Helper()
	b, err := os.ReadFile(from)
	if err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(to, b, 0o644); err != nil {
		t.Fatal(err)
	}
}

// TestIMUNoise runs the command on ten minutes of a simulated static IMU
// and checks the configuration it writes against the terms simulated: the
// offset's random walk is N^2 and the reading variance Q^2 (IEEE Std
// 952-1997, Annex C; the mapping in fusion/calib), each within 10% (N and Q
// read within 5%).
func TestIMUNoise(t *testing.T) {
	const arw, q = 1e-3, 5e-4
	dir := t.TempDir()
	rec := filepath.Join(dir, "static.jsonl")
	writeStatic(t, rec, 60_000, arw, q)
	absolute := filepath.Join(dir, "robot.yaml")
	copyFile(t, "../../../testdata/robots/drive-wheel-turn.yaml", absolute)
	ctx := context.Background()

	out := filepath.Join(dir, "tuned.yaml")
	stdout, stderr, code := runCode(t, ctx, "", "imu-noise", rec, "-config", absolute, "-out", out)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	for _, want := range []string{"tau_s", "N angle random walk", "Q reading noise", "noise.imu_offset_var_rad2_per_s", "wrote " + out} {
		if !strings.Contains(stdout, want) {
			t.Errorf("output lacks %q:\n%s", want, stdout)
		}
	}
	data, err := os.ReadFile(out)
	if err != nil {
		t.Fatal(err)
	}
	_, cfg, err := convert.LoadConfigYAML(data)
	if err != nil {
		t.Fatalf("the new configuration: %v\n%s", err, data)
	}
	for _, c := range []struct {
		name      string
		got, want float64
	}{
		{"imu_offset_var_rad2_per_s", cfg.Noise.IMUOffsetVarRad2PerS, arw * arw},
		{"imu_heading_var_rad2", cfg.Noise.IMUHeadingVarRad2, q * q},
	} {
		if math.Abs(c.got-c.want) > 0.1*c.want {
			t.Errorf("%s = %.4g, want %.4g within 10%%", c.name, c.got, c.want)
		}
	}
	if cfg.Noise.WheelVarM2PerM != 2.5e-5 {
		t.Errorf("wheel_var_m2_per_m = %v, want the input's 2.5e-5 kept", cfg.Noise.WheelVarM2PerM)
	}
	if first, _, _ := strings.Cut(string(data), "\n"); !strings.HasPrefix(first, "# reckon imu-noise: noise.imu_heading_var_rad2 2.5e-05 (default) -> ") ||
		!strings.Contains(first, "IEEE Std 952-1997") || !strings.Contains(first, "static.jsonl") {
		t.Errorf("first line %q does not say what changed, from what and how", first)
	}

	// Never overwrite: the input itself, or an existing file without -force.
	before, _ := os.ReadFile(absolute)
	if _, _, code := runCode(t, ctx, "", "imu-noise", rec, "-config", absolute, "-out", absolute); code != exitUsage {
		t.Errorf("-out the input: exit %d, want %d", code, exitUsage)
	}
	if after, _ := os.ReadFile(absolute); string(after) != string(before) {
		t.Error("the input configuration changed")
	}
	if _, stderr, code := runCode(t, ctx, "", "imu-noise", rec, "-config", absolute, "-out", out); code != exitRefused || !strings.Contains(stderr, "exists") {
		t.Errorf("-out existing: exit %d, want %d: %s", code, exitRefused, stderr)
	}
	if _, stderr, code := runCode(t, ctx, "", "imu-noise", rec, "-config", absolute, "-out", out, "-force"); code != 0 {
		t.Errorf("-force: exit %d: %s", code, stderr)
	}

	// imu_mode rotation: the offset's random walk N^2, which is the
	// heading's there; the turn term per radian (scale factor errors, which
	// a static recording cannot see) as it was.
	rotation := filepath.Join(dir, "gyro.yaml")
	copyFile(t, "../../../testdata/robots/gyro-turn.yaml", rotation)
	out2 := filepath.Join(dir, "gyro-tuned.yaml")
	if _, stderr, code := runCode(t, ctx, "", "imu-noise", "-turn-rate", "0.4", rec, "-config", rotation, "-out", out2); code != 0 {
		t.Fatalf("rotation: exit %d: %s", code, stderr)
	}
	data, _ = os.ReadFile(out2)
	_, cfg, err = convert.LoadConfigYAML(data)
	if err != nil {
		t.Fatal(err)
	}
	if want := arw * arw; math.Abs(cfg.Noise.IMUOffsetVarRad2PerS-want) > 0.1*want {
		t.Errorf("imu_offset_var_rad2_per_s = %.4g, want %.4g within 10%%", cfg.Noise.IMUOffsetVarRad2PerS, want)
	}
	if cfg.Noise.IMUTurnVarRad2PerRad != 1e-6 {
		t.Errorf("imu_turn_var_rad2_per_rad = %g, want the input's 1e-6 kept", cfg.Noise.IMUTurnVarRad2PerRad)
	}
}

func TestIMUNoiseRefuses(t *testing.T) {
	dir := t.TempDir()
	short := filepath.Join(dir, "short.jsonl")
	writeStatic(t, short, 5, 1e-3, 0)
	noHeadings := filepath.Join(dir, "fixes.jsonl")
	if err := os.WriteFile(noHeadings, []byte(`{"fix":{"stamp_ns":"5","sensor_id":"camera","pose":{"x_m":1}}}`+"\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	ctx := context.Background()
	for _, c := range []struct {
		name string
		args []string
		code int
	}{
		{"no file", []string{"imu-noise"}, exitUsage},
		{"config without out", []string{"imu-noise", short, "-config", exampleConfig}, exitUsage},
		{"too short", []string{"imu-noise", short}, exitRefused},
		{"no headings", []string{"imu-noise", noHeadings}, exitRefused},
		{"out without config", []string{"imu-noise", short, "-out", filepath.Join(dir, "x.yaml")}, exitUsage},
	} {
		if _, stderr, code := runCode(t, ctx, "", c.args...); code != c.code {
			t.Errorf("%s: exit %d, want %d: %s", c.name, code, c.code, stderr)
		}
	}
}

// TestIMUNoiseHorizonFromFixes: -fix-heading-std and -fix-interval solve
// the horizon, the time constant of the offset's estimate; for angle random
// walk alone it is sqrt(R) / N with R the fixes' heading variance times
// their interval (calib's OffsetHorizon, closed form). The flags go
// together and exclude -horizon.
func TestIMUNoiseHorizonFromFixes(t *testing.T) {
	const arw, q = 1e-3, 5e-4
	rec := filepath.Join(t.TempDir(), "static.jsonl")
	writeStatic(t, rec, 60_000, arw, q)
	ctx := context.Background()
	stdout, stderr, code := runCode(t, ctx, "", "imu-noise", "-fix-heading-std", "0.02", "-fix-interval", "0.3", rec)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, stderr)
	}
	_, after, ok := strings.Cut(stdout, "horizon T ")
	var got float64
	if ok {
		got, _ = strconv.ParseFloat(strings.Fields(after)[0], 64)
	}
	if want := math.Sqrt(0.02*0.02*0.3) / arw; math.Abs(got-want) > 0.1*want || !strings.Contains(stdout, "time constant") {
		t.Errorf("horizon %v s, want %.3g within 10%% (N read within 5%%), said to be the offset's time constant:\n%s", got, want, stdout)
	}
	for _, args := range [][]string{
		{"-fix-heading-std", "0.02"},
		{"-fix-interval", "0.3"},
		{"-fix-heading-std", "0.02", "-fix-interval", "0.3", "-horizon", "5"},
		{"-fix-heading-std", "-0.02", "-fix-interval", "0.3"},
		{"-fix-heading-std", "NaN", "-fix-interval", "0.3"},
	} {
		if _, _, code := runCode(t, ctx, "", append(append([]string{"imu-noise"}, args...), rec)...); code != exitUsage {
			t.Errorf("%v: exit %d, want %d", args, code, exitUsage)
		}
	}
}

// TestIMUNoiseConfigWithoutIMU: a configuration whose imu_mode is none,
// or unset (none too), uses no IMU: imu-noise refuses to write its IMU
// terms into it (exit 5, naming imu_mode and the remedy) before it reads
// the recording, and writes no file. Before, it wrote the heading and
// offset terms, which changed nothing, and said "wrote".
func TestIMUNoiseConfigWithoutIMU(t *testing.T) {
	dir := t.TempDir()
	rec := filepath.Join(dir, "static.jsonl")
	writeStatic(t, rec, 6000, 1e-3, 5e-4)
	b, err := os.ReadFile("../../../testdata/robots/drive-wheel-turn.yaml")
	if err != nil {
		t.Fatal(err)
	}
	for i, mode := range []string{"imu_mode: none\n", ""} {
		cfgText := strings.Replace(string(b), "imu_mode: absolute\n", mode, 1)
		if cfgText == string(b) {
			t.Fatal("drive-wheel-turn.yaml has no imu_mode: absolute")
		}
		cfg, out := filepath.Join(dir, "robot.yaml"), filepath.Join(dir, fmt.Sprintf("tuned-%d.yaml", i))
		if err := os.WriteFile(cfg, []byte(cfgText), 0o644); err != nil {
			t.Fatal(err)
		}
		_, stderr, code := runCode(t, context.Background(), "", "imu-noise", rec, "-config", cfg, "-out", out)
		if code != exitRefused || !strings.Contains(stderr, "imu_mode") || !strings.Contains(stderr, "absolute or rotation") {
			t.Errorf("%q: exit %d, want %d naming imu_mode: %s", mode, code, exitRefused, stderr)
		}
		if _, err := os.Stat(out); !os.IsNotExist(err) {
			t.Errorf("%q: %s written (%v)", mode, out, err)
		}
	}
}
