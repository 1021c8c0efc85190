package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"text/tabwriter"

	"reckon.example/fusion"
	"reckon.example/fusion/calib"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

func runIMUNoise(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("imu-noise", "FILE.jsonl [-config ROBOT.yaml -out NEW.yaml] [flags]", `
Reads the heading samples of a static recording (the robot standing still,
JSON Lines of reckon.v1.Sample), differences successive headings into
rates, and prints their overlapping Allan deviation (IEEE Std 952-1997,
Annex C), the noise terms read from its slopes (reading noise Q, angle
random walk N, bias instability B, rate random walk K) and the IMU terms of
the robot configuration they give. With -config and -out it writes a new
configuration with those terms; it never overwrites the input, and refuses
a configuration whose imu_mode is none (the terms written depend on the
mode).`)
	fs.SetOutput(stderr)
	config := fs.String("config", "", "YAML robot configuration to start from (with -out)")
	out := fs.String("out", "", "the new YAML configuration (with -config); refused if it exists, unless -force")
	force := fs.Bool("force", false, "replace -out if it exists")
	horizon := fs.Float64("horizon", 10, "seconds over which bias instability and rate random walk are spread into the offset's random walk: the time constant with which the fixes correct the offset, far longer than the time between them (-fix-heading-std and -fix-interval solve it)")
	fixStd := fs.Float64("fix-heading-std", 0, "standard deviation of the heading of the fixes that correct the IMU's offset, rad (with -fix-interval, instead of -horizon)")
	fixInterval := fs.Float64("fix-interval", 0, "seconds between those fixes (with -fix-heading-std)")
	turnRate := fs.Float64("turn-rate", 0.5, "a typical turn rate, rad/s, for the printed imu_turn_var_rad2_per_rad, the angle random walk per radian turned (not written: imu_mode rotation takes the walk per second, imu_offset_var_rad2_per_s)")
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	switch {
	case len(pos) != 1:
		return usagef(fs, "needs one JSON Lines file, got %d arguments", len(pos))
	case (*config == "") != (*out == ""):
		return usagef(fs, "-config and -out go together")
	case *config != "" && samePath(*config, *out):
		return usagef(fs, "-out is the input configuration %s; it is never overwritten", *config)
	case *out != "" && samePath(pos[0], *out):
		return usagef(fs, "-out is the recording %s; it is never overwritten", pos[0])
	case !(*horizon > 0) || !(*turnRate > 0):
		return usagef(fs, "-horizon and -turn-rate must be positive")
	case (*fixStd != 0) != (*fixInterval != 0):
		return usagef(fs, "-fix-heading-std and -fix-interval go together")
	case *fixStd != 0 && !(*fixStd > 0 && *fixStd < 10 && *fixInterval > 0 && *fixInterval < 1e6):
		return usagef(fs, "-fix-heading-std %v rad and -fix-interval %v s must be positive (below 10 rad and 1e6 s)", *fixStd, *fixInterval)
	case *fixStd != 0 && isSet(fs, "horizon"):
		return usagef(fs, "-horizon, or -fix-heading-std with -fix-interval, not both")
	}
	if *out != "" && !*force {
		if _, err := os.Stat(*out); err == nil {
			return fmt.Errorf("%w: %s exists (-force replaces it)", errRefused, *out)
		}
	}
	var cfg *pb.RobotConfig
	if *config != "" {
		if cfg, err = imuConfig(*config); err != nil {
			return err
		}
	}
	stamps, headings, err := readHeadings(ctx, pos[0])
	if err != nil {
		return err
	}
	rates, dt, err := calib.RatesFromHeadings(stamps, headings)
	if err != nil {
		return fmt.Errorf("%s: %w: %w", pos[0], errRefused, err)
	}
	if len(rates) < 6 {
		return fmt.Errorf("%s: %w: %w", pos[0], errRefused, calib.ErrTooShort)
	}
	pts := calib.AllanDeviation(nil, rates, dt, calib.ClusterSizes(len(rates)/2, 10))
	nz := calib.Fit(pts, len(rates))
	how := "set by -horizon; -fix-heading-std and -fix-interval would solve it"
	if *fixStd > 0 {
		how = "set by -horizon, unused: no drift term to spread"
		if h, ok := nz.OffsetHorizon(*fixStd**fixStd, *fixInterval); ok {
			*horizon = h
			how = fmt.Sprintf("the time constant of the offset's estimate under fixes of heading std %g rad every %g s", *fixStd, *fixInterval)
		}
	}
	terms := nz.IMUTerms(*horizon, *turnRate)
	if err := printIMUNoise(stdout, pos[0], len(headings), dt, pts, nz, terms, *horizon, how, *turnRate); err != nil {
		return err
	}
	if cfg == nil {
		return nil
	}
	return writeIMUConfig(cfg, *config, *out, filepath.Base(pos[0]), nz, terms, *horizon, *turnRate, stdout)
}

// imuConfig reads the configuration to write the IMU terms into. One
// whose imu_mode is none (or unset) is refused: its robot uses no IMU, so
// the terms would change nothing, and which terms to write depends on the
// mode the IMU will be used in.
func imuConfig(path string) (*pb.RobotConfig, error) {
	c, err := loadYAML(path)
	if err != nil {
		return nil, err
	}
	if m := c.GetImuMode(); m == pb.ImuMode_IMU_MODE_NONE || m == pb.ImuMode_IMU_MODE_UNSPECIFIED {
		return nil, fmt.Errorf("%w: %s: imu_mode is none (or unset): the robot uses no IMU, and IMU terms would change nothing; set imu_mode to absolute or rotation (the terms written depend on it) and run again, or leave out -config and -out to print the terms only", errRefused, path)
	}
	return c, nil
}

// samePath says whether two paths name the same file, or would.
func samePath(a, b string) bool {
	if ia, err := os.Stat(a); err == nil {
		if ib, err := os.Stat(b); err == nil {
			return os.SameFile(ia, ib)
		}
	}
	aa, err1 := filepath.Abs(a)
	ab, err2 := filepath.Abs(b)
	return err1 == nil && err2 == nil && aa == ab
}

// readHeadings reads the heading samples of a JSON Lines file; other
// samples are skipped.
func readHeadings(ctx context.Context, path string) (stamps []int64, headings []float64, err error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, nil, err
	}
	defer f.Close()
	sr := convert.NewSampleReader(f)
	for {
		if err := ctx.Err(); err != nil {
			return nil, nil, err
		}
		s, err := sr.Next()
		if err == io.EOF {
			break
		}
		if err != nil {
			return nil, nil, fmt.Errorf("%s: %w", path, err)
		}
		if h := s.GetHeading(); h != nil {
			stamps = append(stamps, h.GetStampNs())
			headings = append(headings, h.GetHeadingRad())
		}
	}
	if len(stamps) == 0 {
		return nil, nil, fmt.Errorf("%s: %w: no heading samples", path, errRefused)
	}
	return stamps, headings, nil
}

// termRows are the noise terms as printed: label, unit, slope and term.
func termRows(nz calib.Noise) []struct {
	label, unit, slope string
	t                  calib.Term
} {
	return []struct {
		label, unit, slope string
		t                  calib.Term
	}{
		{"Q reading noise", "rad", "-1", nz.Q},
		{"N angle random walk", "rad/sqrt(s)", "-1/2", nz.N},
		{"B bias instability", "rad/s", "0 (minimum / 0.664)", nz.B},
		{"K rate random walk", "rad/s^1.5", "+1/2", nz.K},
	}
}

func printIMUNoise(w io.Writer, file string, n int, dt float64, pts []calib.Point, nz calib.Noise, terms calib.IMUTerms, horizon float64, horizonHow string, turnRate float64) error {
	fmt.Fprintf(w, "%s: %d headings every %.4g s (%.0f s)\n\n", file, n, dt, float64(n-1)*dt)
	fmt.Fprintln(w, "overlapping Allan deviation of the heading rate (IEEE Std 952-1997, Annex C):")
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "tau_s\tdev_rad_per_s\tcount\t")
	for _, p := range pts {
		fmt.Fprintf(tw, "%.4g\t%.4g\t%d\t\n", p.TauS, p.Dev, p.Count)
	}
	tw.Flush()
	fmt.Fprintln(w, "\nnoise terms (slope segments of the log-log plot):")
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	for _, r := range termRows(nz) {
		switch {
		case r.t.Found && r.t.Slope != 0:
			fmt.Fprintf(tw, "  %s\t%.4g %s\tslope %s over tau %.4g to %.4g s (%d points, fitted slope %+.3f)\n",
				r.label, r.t.Coef, r.unit, r.slope, r.t.FromS, r.t.ToS, r.t.Points, r.t.Slope)
		case r.t.Found:
			fmt.Fprintf(tw, "  %s\t%.4g %s\tslope %s, flat over tau %.4g to %.4g s (%d points)\n",
				r.label, r.t.Coef, r.unit, r.slope, r.t.FromS, r.t.ToS, r.t.Points)
		case r.t.Coef > 0:
			fmt.Fprintf(tw, "  %s\t<= %.4g %s\tno flat segment: an upper bound, not used\n", r.label, r.t.Coef, r.unit)
		default:
			fmt.Fprintf(tw, "  %s\t-\tno segment of slope %s\n", r.label, r.slope)
		}
	}
	tw.Flush()
	fmt.Fprintf(w, "\nconfiguration terms (horizon T %.3g s: %s; turn rate %g rad/s; fusion/calib has the mapping):\n", horizon, horizonHow, turnRate)
	for _, c := range configRows(terms) {
		if c.value > 0 {
			fmt.Fprintf(w, "  noise.%s: %.4g\t# %s\n", c.key, c.value, c.how)
		} else {
			fmt.Fprintf(w, "  noise.%s: not determined\n", c.key)
		}
	}
	return nil
}

// configRow is one IMU term of the configuration with how it was derived.
type configRow struct {
	key   string
	value float64
	how   string
}

func configRows(t calib.IMUTerms) []configRow {
	return []configRow{
		{"imu_heading_var_rad2", t.HeadingVarRad2, "Q^2"},
		{"imu_offset_var_rad2_per_s", t.OffsetVarRad2PerS, "N^2 + B^2 T + K^2 T^2 / 3"},
		{"imu_turn_var_rad2_per_rad", t.TurnVarRad2PerRad, "N^2 / turn rate"},
	}
}

// writeIMUConfig writes the configuration c, read from in, with the IMU
// terms the robot uses set, to out, with a comment saying what changed.
// The terms set depend on imu_mode: rotation sets the offset's random
// walk, which is the heading's there (the IMU's zero drifting enters every
// turn it reports; fusion.Config.HeadingDriftVarPerS), and keeps the turn
// term per radian, which a static recording cannot see (scale factor
// errors); absolute sets the heading and offset terms (imuConfig refuses
// none).
func writeIMUConfig(c *pb.RobotConfig, in, out, file string, nz calib.Noise, terms calib.IMUTerms, horizon, turnRate float64, stdout io.Writer) error {
	rows := configRows(terms)
	if c.GetImuMode() == pb.ImuMode_IMU_MODE_ROTATION {
		rows = rows[1:2]
	} else {
		rows = rows[:2]
	}
	def := fusion.DefaultNoise()
	defaults := map[string]float64{
		"imu_heading_var_rad2":      def.IMUHeadingVarRad2,
		"imu_offset_var_rad2_per_s": def.IMUOffsetVarRad2PerS,
		"imu_turn_var_rad2_per_rad": def.IMUTurnVarRad2PerRad,
	}
	var edits []configEdit
	for _, r := range rows {
		if r.value <= 0 {
			continue
		}
		edits = append(edits, configEdit{path: "noise." + r.key, value: strconv.FormatFloat(r.value, 'g', 4, 64),
			comment: "from imu-noise: " + r.how, absent: strconv.FormatFloat(defaults[r.key], 'g', -1, 64) + " (default)"})
	}
	if len(edits) == 0 {
		return fmt.Errorf("%w: the Allan deviation of %s determines none of the IMU terms this robot uses", errRefused, file)
	}
	changes, err := writeConfigEdits(in, out, edits, func(changes []string) string {
		return fmt.Sprintf("reckon imu-noise: %s; from the overlapping Allan deviation (IEEE Std 952-1997, Annex C) of the static recording %s: %s; horizon T %.3g s, turn rate %g rad/s",
			strings.Join(changes, ", "), file, termSummary(nz), horizon, turnRate)
	})
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "\nwrote %s: %s\n", out, strings.Join(changes, ", "))
	return nil
}

// termSummary names the terms found, for the comment in the new file.
func termSummary(nz calib.Noise) string {
	var parts []string
	for _, r := range termRows(nz) {
		if r.t.Found {
			parts = append(parts, fmt.Sprintf("%s %.3g %s", strings.SplitN(r.label, " ", 2)[0], r.t.Coef, r.unit))
		}
	}
	if len(parts) == 0 {
		return "no term found"
	}
	return strings.Join(parts, ", ")
}
