package main

import (
	"bufio"
	"context"
	"encoding/csv"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"text/tabwriter"

	"reckon.example/clients/review"
	"reckon.example/estimator"
	"reckon.example/fusion"
	"reckon.example/fusion/calib"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

func runTune(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("tune", "(-journal DIR -robot NAME [-config ROBOT.yaml] | -config ROBOT.yaml -samples FILE.jsonl) [-out NEW.yaml] [-model] [-keep-undetermined] [-truth TRUTH.csv] [-report DIR]", `
Fits the noise levels of a robot configuration to a recorded run by
maximising the likelihood of the run's innovations (the prediction-error
decomposition): the run is replayed through the estimator under candidate
levels, on a log scale. It prints each level as configured and fitted with
a 95% interval from the observed Fisher information, says which levels the
run does not determine, and the mean NIS and whiteness of each sensor's
innovations before and after; with -truth, the NEES. A variance the run
does not determine (a noise term or a sensor's covariance) is set to the
upper end of its 95% likelihood interval, the largest value the run does
not reject (set low it would make the covariance overconfident);
-keep-undetermined keeps such levels as configured instead (correlation
times and degrees of freedom the run does not determine are always kept).
With -model it first chooses the form of the noise model by the run's
likelihood (a Gauss-Markov part and Student-t tails for each white
Gaussian sensor, body-step noise per second instead of per metre, the IMU
offset's walk per radian turned, the marker map's survey error), then
fits its levels (the body-step levels on the run thinned to one fix per
3 s, where a correlated camera's errors have mostly decorrelated). It
writes the new configuration to -out and never overwrites the input. No
ground truth is needed for the fit. The run is named as for calibrate
(-journal and -robot, or -samples); a journal's run is tuned from its own
configuration unless -config names another. The older form, the run as the
last argument (a JSON Lines file, or a journal directory with -robot), still
works. A recording of several runs (a controller restart begins one) is
tuned one run at a time: run 1, or -run N. With -report, the run is replayed
under the configuration before and after into one HTML report with a
calibration section at the top.`)
	fs.SetOutput(stderr)
	dir := fs.String("journal", "", "journal directory (with -robot)")
	samples := fs.String("samples", "", "JSON Lines file of samples in arrival order (with -config)")
	config := fs.String("config", "", "YAML robot configuration to start from (for -samples; for a journal it replaces the journal's own)")
	out := fs.String("out", "", "the new YAML configuration (default: ROBOT-tuned.yaml beside -config); refused if it exists, unless -force")
	force := fs.Bool("force", false, "replace -out if it exists")
	robot := fs.String("robot", "", journalRobotHelp)
	truth := fs.String("truth", "", "CSV of the true pose (stamp_ns,x_m,y_m,heading_rad), for the NEES before and after")
	reportDir := fs.String("report", "", "also write an HTML report comparing the run before and after into this directory")
	model := fs.Bool("model", false, "first choose the noise model's form by the run's likelihood (Akaike's criterion): a Gauss-Markov part and Student-t tails for each white Gaussian sensor, noise per second instead of per metre for body steps, the IMU offset's walk per radian turned (a gyro's scale error), the marker map's survey error (landmark_position_std_m); then fit its levels")
	maxSE := fs.Float64("max-se", 0.35, "largest standard error of a level's natural log for the run to count as determining it")
	runN := fs.Uint64("run", 0, "the run to tune, from 1 (a controller restart begins a run, on a clock of its own; default 1)"+noRunHelp)
	keep := fs.Bool("keep-undetermined", false, "keep the variances the run does not determine at their configured values (default: the upper end of each one's 95% likelihood interval)")
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	named := 0
	for _, v := range []string{*dir, *samples} {
		if v != "" {
			named++
		}
	}
	switch {
	case named+len(pos) != 1:
		return usagef(fs, "name one run: -journal DIR -robot NAME, or -config ROBOT.yaml -samples FILE.jsonl (or the run as the last argument)")
	case !(*maxSE > 0) || math.IsInf(*maxSE, 0):
		return usagef(fs, "-max-se must be positive")
	}
	run := *samples
	switch {
	case *dir != "":
		run = *dir
	case len(pos) == 1:
		run = pos[0]
		if st, err := os.Stat(run); err == nil && st.IsDir() {
			*dir = run
		} else {
			*samples = run
		}
	}
	switch {
	case *dir != "" && *robot == "":
		return usagef(fs, "%s is a journal directory: name the robot with -robot", *dir)
	case *samples != "" && *config == "":
		return usagef(fs, "a samples file needs -config ROBOT.yaml")
	case *config == "" && *out == "":
		return usagef(fs, "a journal's own configuration needs -out NEW.yaml")
	}
	if err := journalDir(*dir); err != nil {
		return err
	}
	if *out == "" {
		*out = strings.TrimSuffix(*config, filepath.Ext(*config)) + "-tuned.yaml"
	}
	if *config != "" && samePath(*config, *out) {
		return usagef(fs, "-out is the input configuration %s; it is never overwritten", *config)
	}
	if *samples != "" && samePath(*samples, *out) {
		return usagef(fs, "-out is the recording %s; it is never overwritten", *samples)
	}
	if !*force {
		if _, err := os.Stat(*out); err == nil {
			return fmt.Errorf("%w: %s exists (-force replaces it)", errRefused, *out)
		}
	}
	cfgName, cfgData, err := startConfig(*config, *dir, *robot)
	if err != nil {
		return err
	}
	cfgProto, cfg, err := convert.LoadConfigYAML(cfgData)
	if err != nil {
		return fmt.Errorf("%s: %w: %w", cfgName, errRefused, err)
	}
	rec, err := readRun(ctx, run, *robot, cfgProto, *runN)
	if err != nil {
		return err
	}
	inputs := rec.inputs
	fmt.Fprint(stdout, rec.tornNote())
	var truthPoses []calib.StampedPose
	if *truth != "" {
		if truthPoses, err = readTruthCSV(*truth); err != nil {
			return err
		}
	}
	fit, err := interruptible(ctx, func() (*calib.NoiseFit, error) {
		return calib.FitNoise(cfg, inputs, calib.NoiseFitOptions{MaxStdErrLog: *maxSE, ChooseModel: *model, KeepUndetermined: *keep})
	})
	if errors.Is(err, context.Canceled) {
		return err
	}
	if err != nil {
		return fmt.Errorf("%s: %w: %w", run, errRefused, err)
	}
	printTune(stdout, run+rec.note(), inputs, rec.skipped, fit)
	if truthPoses != nil {
		if err := printNEES(stdout, cfg, fit.Config, inputs, truthPoses); err != nil {
			return fmt.Errorf("%s: %w", *truth, err)
		}
	}
	wrote, err := writeTunedConfig(cfgName, cfgData, *out, filepath.Base(run), cfg, fit, stdout)
	if err != nil || *reportDir == "" {
		return err
	}
	src := review.Source{Samples: *samples, Config: cfgProto, Truth: *truth, Run: rec.run}
	if *dir != "" {
		src = review.Source{JournalDir: *dir, Robot: *robot, Config: cfgProto, Truth: *truth, Run: rec.run}
	}
	cols, rows := levelTable(fit)
	cal := review.Calibration{By: "reckon tune", Columns: cols, Rows: rows, Notes: []string{wrote}}
	return writeCalibrationReport(ctx, stdout, *reportDir, src, cfgProto, *out, cal)
}

// levelTable is the table of a noise fit's levels: each as configured and
// fitted with its 95% interval, or why the run does not determine it.
func levelTable(fit *calib.NoiseFit) ([]string, [][]string) {
	cols := []string{"level", "unit", "configured", "fitted", "95% interval", "determined"}
	var rows [][]string
	for _, l := range fit.Levels {
		switch {
		case l.Identifiable:
			rows = append(rows, []string{l.Field, l.Unit, fmt.Sprintf("%.4g", l.Configured), fmt.Sprintf("%.4g", l.Fitted), fmt.Sprintf("[%.4g, %.4g]", l.Lo, l.Hi), "yes"})
		case l.Matched:
			rows = append(rows, []string{l.Field, l.Unit, fmt.Sprintf("%.4g", l.Configured), fmt.Sprintf("%.4g (median NIS)", l.Fitted), "-", "no: " + l.Note})
		case l.Raised:
			rows = append(rows, []string{l.Field, l.Unit, fmt.Sprintf("%.4g", l.Configured), fmt.Sprintf("%.4g (upper end)", l.Fitted), fmt.Sprintf("[-, %.4g]", l.Hi), "no: " + l.Note})
		default:
			rows = append(rows, []string{l.Field, l.Unit, fmt.Sprintf("%.4g", l.Configured), "(kept)", "-", "no: " + l.Note})
		}
	}
	return cols, rows
}

// recording is what readRun read: the inputs of the run asked for in
// arrival order, the reseeds left out of it, and how many runs the
// recording holds (each controller restart, a run start sample, begins
// one on a clock of its own).
type recording struct {
	inputs []calib.RecordedInput
	// kept is how many odometry samples, headings and fixes were read
	// (those in inputs, or handed to readRunEach's keep).
	kept    int
	skipped int
	run     uint64
	runs    uint64
	// torn says where a journal was cut short (the inputs before it are
	// read), or is empty; damaged names its damaged byte ranges
	// (journal.Scan.DamageNote), or is empty; gaps name where it lost
	// inputs to damage (the inputs after each are read).
	torn, damaged string
	gaps          []string
}

// tornNote is the lines that say the journal was cut short or damaged, or
// nothing.
func (rec *recording) tornNote() string {
	note := ""
	if rec.torn != "" {
		note = "note: the journal is truncated: " + rec.torn + " (the inputs before it are used)\n"
	}
	for _, g := range rec.gaps {
		note += "note: " + g + "; the inputs lost are left out, the inputs after it are used\n"
	}
	if rec.damaged != "" {
		note += "note: " + rec.damaged + " (every intact record around it is used)\n"
	}
	return note
}

// note says which run of several the recording's inputs are, or nothing
// for a recording of one run.
func (rec *recording) note() string {
	if rec.runs < 2 {
		return ""
	}
	return fmt.Sprintf(" (run %d of %d runs: a controller restart begins a run on a clock of its own; -run N for another)", rec.run, rec.runs)
}

// readRun reads the inputs of run want (from 1; 0 is 1) in arrival order
// from a JSON Lines file of samples or from a journal directory (with
// robot); reseeds are counted in skipped and left out. The runs of a
// recording are never mixed: their clocks differ.
func readRun(ctx context.Context, path, robot string, cfg *pb.RobotConfig, want uint64) (*recording, error) {
	var inputs []calib.RecordedInput
	rec, err := readRunEach(ctx, path, robot, cfg, want, func(d *convert.Decoded) {
		// Each input is copied out of d, so that the recording keeps only
		// its own kind: a pointer into d kept all of d (248 bytes an input,
		// where odometry needs 80).
		switch d.Kind {
		case fusion.InputOdometry:
			o := d.Odometry
			inputs = append(inputs, calib.RecordedInput{Odometry: &o})
		case fusion.InputHeading:
			h := d.Heading
			inputs = append(inputs, calib.RecordedInput{Heading: &h})
		case fusion.InputFix:
			f := d.Fix
			inputs = append(inputs, calib.RecordedInput{Fix: &f})
		}
	})
	if err != nil {
		return nil, err
	}
	rec.inputs = inputs
	return rec, nil
}

// readRunEach reads run want as readRun does, but hands each odometry
// sample, IMU heading and fix to keep, in arrival order, instead of
// keeping them: the recording it returns has no inputs.
func readRunEach(ctx context.Context, path, robot string, cfg *pb.RobotConfig, want uint64, keep func(*convert.Decoded)) (*recording, error) {
	want = max(want, 1)
	var torn, damaged string
	var gaps []string
	kept, skipped, run := 0, 0, uint64(1)
	add := func(s *pb.Sample) error {
		if s.GetRunStart() != nil {
			run++
			return nil
		}
		if run != want {
			return nil
		}
		d, err := convert.Decode(s)
		if err != nil {
			return err
		}
		switch d.Kind {
		case fusion.InputOdometry, fusion.InputHeading, fusion.InputFix:
			keep(&d)
			kept++
		default:
			skipped++
		}
		return nil
	}
	if st, err := os.Stat(path); err == nil && st.IsDir() {
		if robot == "" {
			return nil, &usageError{err: fmt.Errorf("%s is a journal directory: name the robot with -robot", path)}
		}
		id, err := journalRobot(robot)
		if err != nil {
			return nil, err
		}
		fr, scan, err := journal.Replay(path, id, journal.ReplayOptions{Config: cfg, ReadOnly: true, SkipOutputs: true, Input: func(r *journal.Replayed) error {
			if err := ctx.Err(); err != nil {
				return err
			}
			if s := r.Input.GetSample(); s != nil {
				return add(s)
			}
			return nil
		}, Gap: func(err error) error {
			gaps = append(gaps, err.Error())
			return nil
		}})
		// A gap is gone past (and named by Gap) only once the journal
		// opened a robot, as in replay.
		if err != nil && (fr == nil || !errors.Is(err, journal.ErrGap)) {
			return nil, err
		}
		if scan.Torn != nil {
			torn = fmt.Sprintf("%v in %s", scan.Torn, filepath.Base(scan.TornSegment))
		}
		damaged = scan.DamageNote()
	} else {
		f, err := os.Open(path)
		if err != nil {
			return nil, err
		}
		defer f.Close()
		sr := convert.NewSampleReader(f)
		for {
			if err := ctx.Err(); err != nil {
				return nil, err
			}
			s, err := sr.Next()
			if errors.Is(err, io.EOF) {
				break
			}
			if err == nil {
				err = add(s)
			}
			if err != nil {
				return nil, fmt.Errorf("%s: %w: %w", path, errRefused, err)
			}
		}
	}
	if want > run {
		return nil, fmt.Errorf("%s: %w", path, review.NoRun(want, run))
	}
	if kept == 0 {
		return nil, fmt.Errorf("%s: %w: no odometry, headings or fixes", path, errRefused)
	}
	return &recording{kept: kept, skipped: skipped, run: want, runs: run, torn: torn, damaged: damaged, gaps: gaps}, nil
}

// readTruthCSV reads a truth file as review takes it (stamp_ns, x_m, y_m,
// heading_rad; a header only as the first record), sorted by stamp. A row
// that is not an integer stamp and three finite numbers is an error
// naming its line.
func readTruthCSV(path string) ([]calib.StampedPose, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	r := csv.NewReader(bufio.NewReader(f))
	r.FieldsPerRecord = -1
	var out []calib.StampedPose
	for n := 1; ; n++ {
		rec, err := r.Read()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return nil, fmt.Errorf("%s: %w: %w", path, errRefused, err)
		}
		line, _ := r.FieldPos(0)
		if n == 1 {
			rec[0] = strings.TrimPrefix(rec[0], "\ufeff")
		}
		stamp, err := strconv.ParseInt(rec[0], 10, 64)
		if err != nil && n == 1 {
			continue // the header
		}
		if err != nil {
			return nil, fmt.Errorf("%s:%d: %w: stamp_ns %q is not an integer (nanoseconds)", path, line, errRefused, rec[0])
		}
		if len(rec) < 4 {
			return nil, fmt.Errorf("%s:%d: %w: %d fields, want stamp_ns,x_m,y_m,heading_rad", path, line, errRefused, len(rec))
		}
		var v [3]float64
		for i := range v {
			if v[i], err = strconv.ParseFloat(rec[i+1], 64); err != nil || math.IsNaN(v[i]) || math.IsInf(v[i], 0) {
				return nil, fmt.Errorf("%s:%d: %w: column %d is not a finite number", path, line, errRefused, i+2)
			}
		}
		out = append(out, calib.StampedPose{StampNs: stamp, Pose: estimator.Pose{X: v[0], Y: v[1], Heading: v[2]}})
	}
	if len(out) == 0 {
		return nil, fmt.Errorf("%s: %w: no truth rows (stamp_ns,x_m,y_m,heading_rad)", path, errRefused)
	}
	sort.SliceStable(out, func(i, j int) bool { return out[i].StampNs < out[j].StampNs })
	return out, nil
}

func printTune(w io.Writer, file string, inputs []calib.RecordedInput, skipped int, fit *calib.NoiseFit) {
	var odo, imu, fixes int
	for _, in := range inputs {
		switch {
		case in.Odometry != nil:
			odo++
		case in.Heading != nil:
			imu++
		default:
			fixes++
		}
	}
	fmt.Fprintf(w, "%s: %d odometry samples, %d IMU headings, %d fixes", file, odo, imu, fixes)
	if skipped > 0 {
		fmt.Fprintf(w, " (%d reseeds left out)", skipped)
	}
	fmt.Fprintf(w, "; %d fixes left out of the fit as gross outliers\n", fit.Excluded)
	fmt.Fprintf(w, "log-likelihood of %d innovations: %.2f configured, %.2f fitted (%d replays of the run)\n\n",
		fit.Innovations, fit.LogLikBefore, fit.LogLikAfter, fit.Replays)
	if len(fit.Model) > 0 {
		var ch []string
		for _, m := range fit.Model {
			ch = append(ch, fmt.Sprintf("%s %s -> %s", m.Field, m.From, m.To))
		}
		fmt.Fprintf(w, "noise model chosen by likelihood (Akaike's criterion; the IMU latency by a likelihood ratio test), the levels below fitted in it: %s\n\n", strings.Join(ch, ", "))
	}
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	cols, rows := levelTable(fit)
	fmt.Fprintln(tw, strings.Join(cols, "\t"))
	for _, r := range rows {
		fmt.Fprintln(tw, strings.Join(r, "\t"))
	}
	tw.Flush()
	fmt.Fprintln(w, "\n95% intervals: exp(log fitted -+ 1.96 se), se from the observed Fisher information (the numerical")
	fmt.Fprintln(w, "Hessian of the log-likelihood in the logs of the levels); a covariance is fitted as a factor on its entries.")
	fmt.Fprintln(w, "\nconsistency: mean NIS against its 95% band (Bar-Shalom, Li and Kirubarajan 2001, sec. 5.4.2); whiteness:")
	fmt.Fprintf(w, "autocorrelations of the whitened innovations at lags 1 to %d beyond 1.96/sqrt(N) (Mehra 1970; white: at most 5%%)\n", calib.WhitenessLags)
	tw = tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "sensor\tinnovations\tmean NIS before\tmean NIS after\tband\twhite before\twhite after")
	for i, b := range fit.Before {
		if i >= len(fit.After) {
			break
		}
		a := fit.After[i]
		fmt.Fprintf(tw, "%s\t%d\t%.3f %s\t%.3f %s\t[%.3f, %.3f]\t%s\t%s\n", b.SensorID, b.Count,
			b.MeanNIS, inBand(b.NISInBand()), a.MeanNIS, inBand(a.NISInBand()), a.Lo, a.Hi, white(&b), white(&a))
	}
	tw.Flush()
}

func inBand(ok bool) string {
	if ok {
		return "(in)"
	}
	return "(out)"
}

func white(c *calib.SensorCheck) string {
	verdict := "no"
	if c.White() {
		verdict = "yes"
	}
	return fmt.Sprintf("%s, %d of %d beyond %.3f (largest %+.3f at lag %d)", verdict, c.Outside, c.Tested, c.Bound, c.MaxAutocorr, c.MaxLag)
}

func printNEES(w io.Writer, before, after fusion.Config, inputs []calib.RecordedInput, truth []calib.StampedPose) error {
	b, err := calib.RunNEES(before, inputs, truth)
	if err != nil {
		return err
	}
	a, err := calib.RunNEES(after, inputs, truth)
	if err != nil {
		return err
	}
	fmt.Fprintf(w, "\nNEES against the truth (%d steps; 3 and 5%% beyond the 95%% quantile for a consistent filter):\n", a.Count)
	fmt.Fprintf(w, "  configured: mean %.2f, %.1f%% beyond\n  fitted:     mean %.2f, %.1f%% beyond\n", b.Mean, 100*b.Outside, a.Mean, 100*a.Outside)
	return nil
}

// writeTunedConfig writes the configuration at in with the determined
// levels fitted to out, each with a comment giving its standard error, and
// a first comment line naming every change; it prints and returns the
// line "wrote OUT: changes".
func writeTunedConfig(in string, data []byte, out, file string, cfg fusion.Config, fit *calib.NoiseFit, stdout io.Writer) (string, error) {
	var edits []configEdit
	var kept, raised []string
	def := fusion.DefaultNoise()
	fitted := map[string]bool{}
	for _, l := range fit.Levels {
		fitted[l.Field] = l.Identifiable || l.Raised || l.Matched
	}
	for _, m := range fit.Model {
		if fitted[m.Field] {
			continue // its fitted value below
		}
		edits = append(edits, configEdit{path: m.Field, value: m.To, absent: m.From + " (default)",
			comment: "from tune: the noise model the run's likelihood supports best"})
	}
	for _, l := range fit.Levels {
		if !l.Identifiable && !l.Raised && !l.Matched {
			kept = append(kept, l.Field)
			continue
		}
		how := fmt.Sprintf("from tune: maximum likelihood, se of log %.3f, 95%% %.4g to %.4g", l.StdErrLog, l.Lo, l.Hi)
		if l.Raised {
			how = "from tune: " + raisedComment
		}
		e := configEdit{path: l.Field, value: strconv.FormatFloat(l.Fitted, 'g', 4, 64), comment: how}
		if strings.HasSuffix(l.Field, ".covariance") {
			cov := cfg.Sensors[l.Sensor].Cov
			if len(cov) == 0 {
				kept = append(kept, fmt.Sprintf("%s (factor %.4g: the sensor has no covariance of its own; scale its fixes')", l.Field, l.Fitted))
				continue
			}
			e.path = l.Field + ".values"
			e.comment = fmt.Sprintf("from tune: times %.4g (se of log %.3f, 95%% %.4g to %.4g)", l.Fitted, l.StdErrLog, l.Lo, l.Hi)
			switch {
			case l.Raised:
				e.comment = fmt.Sprintf("from tune: times %.4g, %s", l.Fitted, raisedComment)
			case l.Matched:
				e.comment = fmt.Sprintf("from tune: times %.4g, matched to the sensor's median NIS (covariance matching; the likelihood does not determine it)", l.Fitted)
			}
			for _, c := range cov {
				e.seq = append(e.seq, strconv.FormatFloat(c*l.Fitted, 'g', 4, 64))
			}
		}
		if l.Raised {
			raised = append(raised, l.Field)
		}
		if v, ok := defaultOf(def, l.Field); ok {
			e.absent = strconv.FormatFloat(v, 'g', -1, 64) + " (default)"
		}
		edits = append(edits, e)
	}
	if len(edits) == 0 {
		return "", fmt.Errorf("%w: the run determines none of the noise levels; nothing written", errRefused)
	}
	changes, err := editConfig(in, data, out, edits, func(changes []string) string {
		note := fmt.Sprintf("reckon tune: %s; by maximum likelihood of the innovations of %s (prediction-error decomposition), standard errors from the observed Fisher information",
			strings.Join(changes, ", "), file)
		if len(raised) > 0 {
			note += "; not determined by the run, at the upper end of its 95% likelihood interval: " + strings.Join(raised, ", ")
		}
		if len(kept) > 0 {
			note += "; not determined by the run, kept: " + strings.Join(kept, ", ")
		}
		return note
	})
	if err != nil {
		return "", err
	}
	wrote := fmt.Sprintf("wrote %s: %s", out, strings.Join(changes, ", "))
	fmt.Fprintf(stdout, "\n%s\n", wrote)
	return wrote, nil
}

// raisedComment is the configuration comment on a variance the run does
// not determine, set to the upper end of its interval.
const raisedComment = "not determined by the run: the upper end of its 95% likelihood interval (set low, an undetermined variance makes the covariance overconfident; set high, it costs little accuracy)"

// defaultOf returns the default of a noise field, if it has one.
func defaultOf(def fusion.Noise, field string) (float64, bool) {
	m := map[string]float64{
		"noise.wheel_var_m2_per_m":          def.WheelVarM2PerM,
		"noise.lateral_slip_var_m2_per_m":   def.LateralSlipVarM2PerM,
		"noise.turn_var_rad2_per_rad":       def.TurnVarRad2PerRad,
		"noise.heading_var_rad2_per_s":      def.HeadingVarRad2PerS,
		"noise.step_forward_var_m2_per_m":   def.StepForwardVarM2PerM,
		"noise.step_left_var_m2_per_m":      def.StepLeftVarM2PerM,
		"noise.step_turn_var_rad2_per_rad":  def.StepTurnVarRad2PerRad,
		"noise.imu_heading_var_rad2":        def.IMUHeadingVarRad2,
		"noise.imu_turn_var_rad2_per_rad":   def.IMUTurnVarRad2PerRad,
		"noise.imu_offset_var_rad2_per_s":   def.IMUOffsetVarRad2PerS,
		"noise.step_forward_var_m2_per_s":   0,
		"noise.step_left_var_m2_per_s":      0,
		"noise.step_turn_var_rad2_per_s":    0,
		"noise.imu_offset_var_rad2_per_rad": 0,
	}
	v, ok := m[field]
	return v, ok
}

// interruptible runs fit, a fit of fusion/calib, which takes no way to be
// stopped (its package is pure), on a goroutine of its own, and returns
// ctx's error as soon as ctx ends: Ctrl-C or SIGTERM then ends tune or
// calibrate at once, with exit 130, where it ran on to the fit's end (a
// calibrate of a long run, sent SIGTERM, still ran 37 minutes later at
// 6.3 GB: the probe of session 26). Nothing is written before the fit
// ends, so nothing is left half written; the goroutine ends with the
// process.
func interruptible[T any](ctx context.Context, fit func() (T, error)) (T, error) {
	type result struct {
		v   T
		err error
	}
	done := make(chan result, 1)
	go func() {
		v, err := fit()
		done <- result{v, err}
	}()
	select {
	case r := <-done:
		return r.v, r.err
	case <-ctx.Done():
		var zero T
		return zero, ctx.Err()
	}
}
