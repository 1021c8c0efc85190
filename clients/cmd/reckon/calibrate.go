package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"

	"reckon.example/clients/review"
	"reckon.example/fusion"
	"reckon.example/fusion/calib"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/daemon"
	"reckon.example/server/journal"
)

func runCalibrate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("calibrate", "(-journal DIR -robot NAME [-config ROBOT.yaml] | -config ROBOT.yaml -samples FILE.jsonl) -out NEW.yaml [flags]", `
Calibrates a robot's systematic parameters from a recorded run with fixes.
It first looks for wiring mistakes (a wheel counting backwards, swapped
wheels, an IMU turning the other way or in degrees) and fix sensors whose
mount is missing or wrong or that stamp their fixes at arrival, and names
the field to change for each; then fits each wheel's scale, the track width,
each fix sensor's mount and latency by a batch least-squares fit to the
fixes, and prints each with its standard error and whether the run
determines it (if not, the driving that would). It writes the corrected
configuration to -out, each change commented; a parameter the configuration
has no field for is printed as a factor to apply by hand. A run that
determines none of them writes nothing (exit status 5). A journal's run
is calibrated from its own configuration unless -config names another. A
recording of several runs (a controller restart begins one) is calibrated
one run at a time: run 1, or -run N.
With -report, the run is replayed under the configuration before and after
into one HTML report with a calibration section at the top.`)
	fs.SetOutput(stderr)
	dir := fs.String("journal", "", "journal directory (with -robot)")
	robot := fs.String("robot", "", journalRobotHelp)
	config := fs.String("config", "", "YAML robot configuration to start from (for -samples; for a journal it replaces the journal's own)")
	samples := fs.String("samples", "", "JSON Lines file of samples in arrival order (with -config)")
	out := fs.String("out", "", "the new YAML configuration; refused if it exists, unless -force")
	force := fs.Bool("force", false, "replace -out if it exists")
	truth := fs.String("truth", "", "CSV of the true pose (stamp_ns,x_m,y_m,heading_rad), for the NEES before and after (default: truth.csv in the journal directory, if there)")
	reportDir := fs.String("report", "", "also write an HTML report comparing the run before and after into this directory")
	runN := fs.Uint64("run", 0, "the run to calibrate, from 1 (a controller restart begins a run, on a clock of its own; default 1)"+noRunHelp)
	if err := parseNone(fs, args, stdout, stderr); err != nil {
		return err
	}
	switch {
	case (*dir == "") == (*samples == ""):
		return usagef(fs, "name a run: -journal DIR -robot NAME, or -config ROBOT.yaml -samples FILE.jsonl")
	case *dir != "" && *robot == "":
		return usagef(fs, "-journal needs -robot NAME")
	case *samples != "" && *config == "":
		return usagef(fs, "-samples needs -config ROBOT.yaml")
	case *out == "":
		return usagef(fs, "needs -out NEW.yaml")
	case *config != "" && samePath(*config, *out):
		return usagef(fs, "-out is the input configuration %s; it is never overwritten", *config)
	case *samples != "" && samePath(*samples, *out):
		return usagef(fs, "-out is the recording %s; it is never overwritten", *samples)
	}
	if err := journalDir(*dir); err != nil {
		return err
	}
	if !*force {
		if _, err := os.Stat(*out); err == nil {
			return fmt.Errorf("%w: %s exists (-force replaces it)", errRefused, *out)
		}
	}
	run, src := *samples, *samples
	if *dir != "" {
		run, src = *dir, fmt.Sprintf("%s (robot %s)", *dir, *robot)
		if *truth == "" {
			if _, err := os.Stat(filepath.Join(*dir, "truth.csv")); err == nil {
				*truth = filepath.Join(*dir, "truth.csv")
			}
		}
	}
	cfgName, cfgData, err := startConfig(*config, *dir, *robot)
	if err != nil {
		return err
	}
	cfgProto, cfg, err := convert.LoadConfigYAML(cfgData)
	if err != nil {
		return fmt.Errorf("%s: %w", cfgName, err)
	}
	// The fit reads the limits as configured, and an unset
	// max_speed_m_per_s (0) would refuse every interval of counts; the
	// robot's configuration has the defaults filled in.
	r, err := fusion.New(cfg)
	if err != nil {
		return fmt.Errorf("%s: %w: %w", cfgName, errRefused, err)
	}
	cfg = r.Config()
	// The run is kept by kind for the wiring's diagnosis, not as a list of
	// inputs (a RecordedInput and a copy of each: about 190 MB of the demo's
	// hour, held through the fit), and let go after it: the two fits read
	// the odometry again (odometry below), keeping only their compact
	// intervals (calib.FitSystematicFrom), and the NEES the whole run.
	var odo []fusion.Odometry
	var imu []fusion.Heading
	var fixes []fusion.Fix
	rec, err := readRunEach(ctx, run, *robot, cfgProto, *runN, func(d *convert.Decoded) {
		switch d.Kind {
		case fusion.InputOdometry:
			odo = append(odo, d.Odometry)
		case fusion.InputHeading:
			imu = append(imu, d.Heading)
		case fusion.InputFix:
			fixes = append(fixes, d.Fix)
		}
	})
	if err != nil {
		return err
	}
	var truthPoses []calib.StampedPose
	if *truth != "" {
		if truthPoses, err = readTruthCSV(*truth); err != nil {
			return err
		}
	}
	fmt.Fprint(stdout, rec.tornNote())
	fmt.Fprintf(stdout, "%s%s: %d odometry samples, %d IMU headings, %d fixes\n", src, rec.note(), len(odo), len(imu), len(fixes))
	// odometry hands the fits the run's odometry read again, the first
	// len(odo) samples (a journal the service still writes to has more
	// by now).
	nOdo := len(odo)
	odometry := func(yield func(*fusion.Odometry) bool) error {
		n, stopped := 0, false
		_, err := readRunEach(ctx, run, *robot, cfgProto, *runN, func(d *convert.Decoded) {
			if d.Kind != fusion.InputOdometry || stopped || n == nOdo {
				return
			}
			n++
			stopped = !yield(&d.Odometry)
		})
		return err
	}

	type diagnosis struct {
		wiring  []calib.Finding
		sensors []calib.Finding
	}
	diag, err := interruptible(ctx, func() (diagnosis, error) {
		wiring := calib.Diagnose(cfg, odo, imu)
		odo, imu = nil, nil
		sensors, err := calib.DiagnoseSensorsFrom(cfg, odometry, fixes)
		return diagnosis{wiring, sensors}, err
	})
	if errors.Is(err, context.Canceled) {
		return err
	}
	if err != nil {
		return fmt.Errorf("%s: %w", run, err)
	}
	wiring, sensors := diag.wiring, diag.sensors
	findings := printFindings(stdout, wiring, sensors)
	for _, f := range wiring {
		if !f.Undetermined {
			return fmt.Errorf("%w: the run shows a wiring mistake (%s); correct it and calibrate again", errRefused, f.Field)
		}
	}

	fit, err := interruptible(ctx, func() (calib.SystematicFit, error) {
		return calib.FitSystematicFrom(cfg, odometry, fixes, calib.SystematicOptions{})
	})
	if errors.Is(err, context.Canceled) {
		return err
	}
	if err != nil {
		return fmt.Errorf("%s: %w: %w", run, errRefused, err)
	}
	cols, rows := paramTable(&fit)
	fmt.Fprintf(stdout, "\nsystematic fit: %d fixes (%d given no weight as gross errors), %d segments, residual variance factor %.2f, %d iterations",
		fit.Fixes, fit.Outliers, fit.Segments, fit.Sigma2, fit.Iterations)
	if !fit.Converged {
		fmt.Fprint(stdout, ", not converged")
	}
	fmt.Fprintln(stdout)
	for i, sen := range cfg.Sensors {
		if sen.CorrelatedFraction > 0 {
			fmt.Fprintf(stdout, "sensors[%d] (%s): fixes weighted as correlated, %.0f%% of their variance Gauss-Markov with a time constant of %g s (correlated_fraction, correlation_time_s)\n",
				i, sen.ID, 100*sen.CorrelatedFraction, sen.CorrelationTimeS)
		}
	}
	for i, w := range fit.Whiteness {
		if w.Correlated {
			fmt.Fprintf(stdout, "sensors[%d] (%s): its residuals, whitened, correlate %.2f from one fix to the next (%d pairs; within %.2f of 0 if its errors were as configured): they repeat over time more than its configuration says, so the standard errors below are too small; run reckon tune -model on the output, then reckon calibrate again on the tuned configuration\n",
				i, cfg.Sensors[i].ID, w.Lag1, w.Pairs, 3/math.Sqrt(float64(w.Pairs)))
		}
	}
	if fit.MountStdNote != "" {
		fmt.Fprintln(stdout, fit.MountStdNote)
	}
	tw := tabwriter.NewWriter(stdout, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, strings.Join(cols, "\t"))
	for _, r := range rows {
		fmt.Fprintln(tw, strings.Join(r, "\t"))
	}
	tw.Flush()
	byHand := byHandNotes(&fit)
	for _, n := range byHand {
		fmt.Fprintln(stdout, n)
	}

	changes, err := writeCalibratedConfig(cfgName, cfgData, *out, src, cfg, &fit)
	if err != nil {
		return err
	}
	wrote := fmt.Sprintf("wrote %s: %s", *out, strings.Join(changes, ", "))
	fmt.Fprintf(stdout, "\n%s\n", wrote)
	if truthPoses != nil {
		// Read again, in arrival order, now that the fit's memory is free:
		// the inputs read at first.
		all, err := readRun(ctx, run, *robot, cfgProto, *runN)
		if err != nil {
			return err
		}
		if err := printNEES(stdout, cfg, fit.Config, all.inputs[:min(len(all.inputs), rec.kept)], truthPoses); err != nil {
			return fmt.Errorf("%s: %w", *truth, err)
		}
	}
	if *reportDir == "" {
		return nil
	}
	rs := review.Source{JournalDir: *dir, Robot: *robot, Samples: *samples, Config: cfgProto, Truth: *truth, Run: rec.run}
	cal := review.Calibration{By: "reckon calibrate", Findings: findings, Columns: cols, Rows: rows, Notes: append(byHand, wrote)}
	return writeCalibrationReport(ctx, stdout, *reportDir, rs, cfgProto, *out, cal)
}

// startConfig returns the configuration to calibrate, as YAML, and its
// name: the file config, or the journal's own configuration.
func startConfig(config, dir, robot string) (string, []byte, error) {
	if config != "" {
		data, err := daemon.ReadFlagFile(config)
		return config, data, err
	}
	id, err := journalRobot(robot)
	if err != nil {
		return "", nil, err
	}
	errOpened := errors.New("opened")
	var c fusion.Config
	_, _, err = journal.Replay(dir, id, journal.ReplayOptions{ReadOnly: true, SkipOutputs: true, Opened: func(r *fusion.Robot) error {
		c = r.Config()
		return errOpened
	}})
	if !errors.Is(err, errOpened) {
		switch {
		case err == nil:
			err = errors.New("the journal has no opening record")
		case errors.Is(err, journal.ErrNoJournal):
			return "", nil, err // it names dir
		}
		return "", nil, fmt.Errorf("%s: %w", dir, err)
	}
	name := fmt.Sprintf("the configuration of %s in %s", robot, dir)
	data, err := configYAML(convert.ConfigToProto(c), "# "+name)
	return name, data, err
}

// splitInputs sorts a run's inputs by kind, each in arrival order.
func splitInputs(inputs []calib.RecordedInput) (odo []fusion.Odometry, imu []fusion.Heading, fixes []fusion.Fix) {
	for _, in := range inputs {
		switch {
		case in.Odometry != nil:
			odo = append(odo, *in.Odometry)
		case in.Heading != nil:
			imu = append(imu, *in.Heading)
		case in.Fix != nil:
			fixes = append(fixes, *in.Fix)
		}
	}
	return odo, imu, fixes
}

// printFindings prints the diagnoses' findings, each a sentence naming the
// field, and returns them.
func printFindings(w io.Writer, wiring, sensors []calib.Finding) []string {
	var out []string
	for _, g := range []struct {
		what string
		fs   []calib.Finding
	}{{"wiring", wiring}, {"fix sensors", sensors}} {
		if len(g.fs) == 0 {
			fmt.Fprintf(w, "%s: no mistake found\n", g.what)
			continue
		}
		fmt.Fprintf(w, "%s:\n", g.what)
		for _, f := range g.fs {
			s := f.Sentence
			if f.Undetermined {
				s = "not checked: " + s
			}
			fmt.Fprintf(w, "  %s\n", s)
			out = append(out, s)
		}
	}
	return out
}

// paramTable is the table of a fit's parameters: name, unit, the fields
// changed, configured, fitted, standard error, determined or why not.
func paramTable(fit *calib.SystematicFit) ([]string, [][]string) {
	cols := []string{"parameter", "unit", "configuration field", "configured", "fitted", "std error", "determined"}
	var rows [][]string
	for _, p := range fit.Params {
		field := strings.Join(p.Fields, ", ")
		if field == "" {
			field = "-"
		}
		if len(p.Fields) > 2 { // the spread changes every wheel's position
			field = fmt.Sprintf("%s ... (%d fields)", p.Fields[0], len(p.Fields))
		}
		unit := p.Unit
		if unit == "" {
			unit = "-"
		}
		det := "yes"
		if !p.Determined {
			det = "no: " + p.Why
		} else if len(p.Fields) == 0 && p.Why != "" {
			det = "yes, by hand (below)"
		}
		rows = append(rows, []string{p.Name, unit, field, strconv.FormatFloat(p.Configured, 'f', 4, 64),
			strconv.FormatFloat(p.Fitted, 'f', 4, 64), strconv.FormatFloat(p.StdErr, 'f', 4, 64), det})
	}
	return cols, rows
}

// byHandNotes are the determined parameters the configuration has no field
// for, each with the factor to apply by hand.
func byHandNotes(fit *calib.SystematicFit) []string {
	var out []string
	for _, p := range fit.Params {
		if p.Determined && len(p.Fields) == 0 && p.Why != "" {
			out = append(out, fmt.Sprintf("by hand: %s %.4f (se %.4f): %s", p.Name, p.Fitted, p.StdErr, p.Why))
		}
	}
	return out
}

// writeCalibratedConfig writes the configuration (data, named in) with the
// fields the fit changed to out, each with a comment naming the parameter,
// its fitted value and standard error, and a first comment line naming
// every change. It returns the changes.
func writeCalibratedConfig(in string, data []byte, out, run string, cfg fusion.Config, fit *calib.SystematicFit) ([]string, error) {
	if !slices.ContainsFunc(fit.Params, func(p calib.Param) bool { return p.Determined }) {
		// Nothing was fitted: the mounts' standard errors would be the
		// fit's weak prior (DEVELOPERS.md, "Design: Systematic
		// parameters"), written as if the run had measured them.
		return nil, fmt.Errorf("%w: the run determines none of the parameters (the table says what driving would); nothing written", errRefused)
	}
	var edits []configEdit
	var kept []string
	for _, p := range fit.Params {
		if !p.Determined {
			kept = append(kept, p.Name)
			continue
		}
		for _, f := range p.Fields {
			old, _ := configValue(cfg, f)
			v, ok := configValue(fit.Config, f)
			if !ok {
				return nil, fmt.Errorf("calibrate: the fit changed %s, which calibrate cannot write", f)
			}
			if v == old {
				continue // a wheel on the spread's centre line does not move
			}
			edits = append(edits, configEdit{path: f, value: v, absent: "0 (default)",
				comment: fmt.Sprintf("from calibrate: %s %s -> %s (se %s)", p.Name, fmtParam(p.Configured, p.Unit), fmtParam(p.Fitted, p.Unit), fmtParam(p.StdErr, p.Unit))})
		}
	}
	for _, f := range fit.ScaleStates {
		v, _ := configValue(fit.Config, f)
		old, _ := configValue(cfg, f)
		edits = append(edits, configEdit{path: f, value: v, absent: old + " (default)",
			comment: "from calibrate: a body step's scale lies more than three standard errors from 1; estimated online"})
	}
	for _, si := range fit.MountStd {
		for _, c := range []string{"x_m", "y_m", "heading_rad"} {
			f := fmt.Sprintf("sensors[%d].mount_std.%s", si, c)
			v, _ := configValue(fit.Config, f)
			if old, _ := configValue(cfg, f); v == old {
				continue
			}
			edits = append(edits, configEdit{path: f, value: v, absent: "0 (default)",
				comment: "from calibrate: the fitted mount's standard error, which the filter carries as consider states (for a number the run does not determine, also its distance to the fit)"})
		}
	}
	if len(edits) == 0 {
		return nil, fmt.Errorf("%w: the fit changes no configuration field; nothing written", errRefused)
	}
	return editConfig(in, data, out, edits, func(changes []string) string {
		note := fmt.Sprintf("reckon calibrate: %s; by a batch least-squares fit of the systematic parameters to the fixes of %s", strings.Join(changes, ", "), run)
		if len(kept) > 0 {
			note += "; not determined by the run, kept: " + strings.Join(kept, ", ")
		}
		return note
	})
}

// fmtParam formats a parameter's value in its unit (angles also in
// degrees, seconds in milliseconds).
func fmtParam(v float64, unit string) string {
	switch unit {
	case "rad":
		return fmt.Sprintf("%.4f rad (%.2f deg)", v, v*180/math.Pi)
	case "s":
		return fmt.Sprintf("%.1f ms", v*1e3)
	case "m":
		return fmt.Sprintf("%.4f m", v)
	}
	return fmt.Sprintf("%.4f", v)
}

// configValue is the value of one field the systematic fit changes, as
// the YAML configuration writes it.
func configValue(c fusion.Config, field string) (string, bool) {
	var i int
	var name string
	g := func(v float64) string { return strconv.FormatFloat(v, 'g', 6, 64) }
	switch {
	case scan(field, "wheels[%d].%s", &i, &name) && i < len(c.Wheels):
		w := c.Wheels[i]
		switch name {
		case "counts_per_m":
			return strconv.FormatFloat(w.CountsPerM, 'g', 7, 64), true
		case "x_m":
			return g(w.XM), true
		case "y_m":
			return g(w.YM), true
		}
	case field == "calibration.scale":
		return strconv.FormatBool(c.Calibration.Scale), true
	case field == "calibration.scale_std":
		return g(c.Calibration.ScaleStd), true
	case scan(field, "sensors[%d].%s", &i, &name) && i < len(c.Sensors):
		s := c.Sensors[i]
		switch name {
		case "mount.x_m":
			return g(s.Mount.X), true
		case "mount.y_m":
			return g(s.Mount.Y), true
		case "mount.heading_rad":
			return g(s.Mount.Heading), true
		case "latency_ns":
			return strconv.FormatInt(s.LatencyNs, 10), true
		case "mount_std.x_m":
			return g(s.MountStd[0]), true
		case "mount_std.y_m":
			return g(s.MountStd[1]), true
		case "mount_std.heading_rad":
			return g(s.MountStd[2]), true
		}
	}
	return "", false
}

// scan is fmt.Sscanf that says whether it read every verb.
func scan(s, format string, args ...any) bool {
	n, _ := fmt.Sscanf(strings.Replace(s, "].", "] ", 1), strings.Replace(format, "].", "] ", 1), args...)
	return n == len(args)
}

// writeCalibrationReport replays the run under the configuration before
// (before) and after (the file after) a calibration into one report in
// dir with the calibration section at the top (review.WriteCalibrationHTML),
// and its summary.
func writeCalibrationReport(ctx context.Context, stdout io.Writer, dir string, src review.Source, before *pb.RobotConfig, after string, cal review.Calibration) error {
	afterProto, err := loadYAML(after)
	if err != nil {
		return err
	}
	st, err := stage(dir)
	if err != nil {
		return err
	}
	var runs []*review.Run
	for _, c := range []struct {
		label string
		cfg   *pb.RobotConfig
	}{{"before", before}, {"after", afterProto}} {
		s := src
		s.Override, s.Label = c.cfg, c.label
		run, err := review.AnalyzeContext(ctx, s, st.tmp, review.Options{})
		if err != nil {
			st.abandon()
			return fmt.Errorf("report, %s: %w", c.label, err)
		}
		runs = append(runs, run)
	}
	return writeReport(ctx, stdout, st, false, runs, func(w io.Writer) error {
		return review.WriteCalibrationHTMLContext(ctx, w, "Calibration of "+runs[0].Robot, cal, runs[0], runs[1])
	})
}
