package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"

	"github.com/schollz/progressbar/v3"

	"reckon.example/clients/review"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/daemon"
)

// sourceFlags name a recorded run.
type sourceFlags struct {
	journal, robot, config, samples, truth, out *string
	run                                         *uint64
	// suffix ends the default -out directory's name ("-compare" for
	// compare), so that -h states the directory outDir makes.
	suffix string
}

func addSourceFlags(fs *flag.FlagSet, suffix string) sourceFlags {
	return sourceFlags{
		suffix:  suffix,
		journal: fs.String("journal", "", "journal directory (with -robot)"),
		robot:   fs.String("robot", "", journalRobotHelp),
		config:  fs.String("config", "", "YAML robot configuration, for -samples"),
		samples: fs.String("samples", "", "JSON Lines file of samples in arrival order (with -config)"),
		truth:   fs.String("truth", "", "CSV of the true pose (stamp_ns,x_m,y_m,heading_rad); the demo leaves truth.csv in its journal directory"),
		out:     fs.String("out", "", fmt.Sprintf("directory for the report and the exports (default review-<robot>%s, review-<robot>-run<N>%s with -run)", suffix, suffix)),
		run:     fs.Uint64("run", 0, "the run to review, from 1 (a controller restart begins a run; default 1)"+noRunHelp),
	}
}

// timeSpan is the -from and -to flags of review, compare and replay: a
// stretch of a run in time from its start (the stamp of its first input).
type timeSpan struct{ fromNs, toNs int64 }

func (ts *timeSpan) add(fs *flag.FlagSet) {
	fs.Var(offsetFlag{&ts.fromNs}, "from", "start of the stretch to cover, from the run's start: seconds (12.5 or 12.5s) or nanoseconds (12500000000ns)")
	fs.Var(offsetFlag{&ts.toNs}, "to", "end of the stretch to cover, from the run's start, as -from (default: the end)")
}

// check refuses a span that ends before it starts.
func (ts timeSpan) check(fs *flag.FlagSet) error {
	if ts.toNs != 0 && ts.toNs < ts.fromNs {
		return usagef(fs, "-to %v is before -from %v", offsetFlag{&ts.toNs}, offsetFlag{&ts.fromNs})
	}
	return nil
}

// holds reports whether an offset from the run's start lies in the span.
// Without -from the span has no lower bound: an input stamped before the
// run's first input (a late fix that arrived first) is part of the run.
func (ts timeSpan) holds(offsetNs int64) bool {
	return (ts.fromNs == 0 || offsetNs >= ts.fromNs) && (ts.toNs == 0 || offsetNs <= ts.toNs)
}

// offsetFlag is a time offset flag: seconds, with or without "s", or
// nanoseconds with "ns".
type offsetFlag struct{ ns *int64 }

func (f offsetFlag) String() string {
	if f.ns == nil || *f.ns == 0 {
		return ""
	}
	return strconv.FormatFloat(float64(*f.ns)*1e-9, 'g', -1, 64) + "s"
}

func (f offsetFlag) Set(v string) error {
	if n, ok := strings.CutSuffix(v, "ns"); ok {
		ns, err := strconv.ParseInt(n, 10, 64)
		if err != nil || ns < 0 {
			return fmt.Errorf("want nanoseconds like 12500000000ns, not %q", v)
		}
		*f.ns = ns
		return nil
	}
	sec, err := strconv.ParseFloat(strings.TrimSuffix(v, "s"), 64)
	if err != nil || sec < 0 || math.IsInf(sec, 0) || math.IsNaN(sec) {
		return fmt.Errorf("want seconds like 12.5 or 12.5s, or nanoseconds like 12500000000ns, not %q", v)
	}
	*f.ns = int64(math.Round(sec * 1e9))
	return nil
}

func loadYAML(path string) (*pb.RobotConfig, error) {
	b, err := daemon.ReadFlagFile(path)
	if err != nil {
		return nil, err
	}
	c, _, err := convert.LoadConfigYAML(b)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return c, nil
}

func (sf sourceFlags) source() (review.Source, error) {
	src := review.Source{JournalDir: *sf.journal, Robot: *sf.robot, Samples: *sf.samples, Truth: *sf.truth, Run: *sf.run}
	switch {
	case *sf.journal != "" && *sf.robot != "":
		id, err := journalRobot(*sf.robot)
		if err == nil {
			err = journalDir(*sf.journal)
		}
		if err != nil {
			return src, err
		}
		src.Robot = id
		if *sf.truth == "" {
			if _, err := os.Stat(filepath.Join(*sf.journal, "truth.csv")); err == nil {
				src.Truth = filepath.Join(*sf.journal, "truth.csv")
			}
		}
	case *sf.samples != "" && *sf.config != "":
		c, err := loadYAML(*sf.config)
		if err != nil {
			return src, err
		}
		src.Config = c
	default:
		return src, &usageError{err: errors.New("name a run: -journal DIR -robot NAME, or -config ROBOT.yaml -samples SAMPLES.jsonl")}
	}
	return src, nil
}

func (sf sourceFlags) outDir(label string) string {
	if *sf.out != "" {
		return *sf.out
	}
	return "review-" + label + sf.suffix
}

func progress(stderr io.Writer, what string) (func(int), func()) {
	if !isTerminal(stderr) {
		return nil, func() {}
	}
	bar := progressbar.NewOptions(-1, progressbar.OptionSetWriter(stderr), progressbar.OptionSetDescription(what),
		progressbar.OptionShowCount(), progressbar.OptionSpinnerType(14), progressbar.OptionClearOnFinish())
	return func(n int) { bar.Set(n) }, func() { bar.Finish() }
}

func runReview(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("review", "(-journal DIR -robot NAME | -config ROBOT.yaml -samples SAMPLES.jsonl) [flags]", `
Replays a recorded run with the smoother and writes a text summary, an HTML
report with figures (problems found, linked to their moment; zoom and pan in
the browser) and CSV exports of the filtered and smoothed tracks and of the
fixes with their final verdicts. -from and -to limit it to a stretch; -run N
reviews run N of a robot whose controller restarted (each run has a clock of
its own; the default is run 1, and the summary names the others).`)
	fs.SetOutput(stderr)
	sf := addSourceFlags(fs, "")
	other := fs.String("with", "", "replay the run with this YAML configuration instead of its own")
	var span timeSpan
	span.add(fs)
	if err := parseNone(fs, args, stdout, stderr); err != nil {
		return err
	}
	if err := span.check(fs); err != nil {
		return err
	}
	src, err := sf.source()
	if err != nil {
		return err
	}
	if *other != "" {
		if src.Override, err = loadYAML(*other); err != nil {
			return err
		}
	}
	label := review.Label(src)
	dir := sf.outDir(label)
	st, err := stage(dir)
	if err != nil {
		return err
	}
	prog, done := progress(stderr, "replaying and smoothing")
	run, err := review.AnalyzeContext(ctx, src, st.tmp, review.Options{Progress: prog, FromNs: span.fromNs, ToNs: span.toNs})
	done()
	if err != nil {
		st.abandon()
		return err
	}
	return writeReports(ctx, stdout, st, "Review of "+run.Robot+" ("+run.Label+")", run)
}

func runCompare(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("compare", "(-journal DIR -robot NAME | -config ROBOT.yaml -samples SAMPLES.jsonl) [-a A.yaml] -b B.yaml [flags]", `
Reviews a run under two configurations, the run's own (or -a) and -b: one
report with both runs' tracks, deviations and NIS overlaid and a table of
their differences.`)
	fs.SetOutput(stderr)
	sf := addSourceFlags(fs, "-compare")
	a := fs.String("a", "", "first YAML configuration (default: the run's own)")
	b := fs.String("b", "", "second YAML configuration")
	var span timeSpan
	span.add(fs)
	if err := parseNone(fs, args, stdout, stderr); err != nil {
		return err
	}
	if err := span.check(fs); err != nil {
		return err
	}
	if *b == "" {
		return usagef(fs, "needs -b OTHER.yaml (and -a, or the run's own configuration)")
	}
	src, err := sf.source()
	if err != nil {
		return err
	}
	dir := sf.outDir(review.Label(src))
	// Both configurations are read before either run is replayed, so that a
	// bad -b leaves no half of a comparison behind.
	srcs := []review.Source{src, src}
	for i, path := range []string{*a, *b} {
		srcs[i].Label = fmt.Sprintf("%c-%s", 'a'+i, "own")
		if path != "" {
			if srcs[i].Override, err = loadYAML(path); err != nil {
				return err
			}
			srcs[i].Label = fmt.Sprintf("%c-%s", 'a'+i, strings.TrimSuffix(filepath.Base(path), filepath.Ext(path)))
		}
	}
	st, err := stage(dir)
	if err != nil {
		return err
	}
	var runs []*review.Run
	for _, s := range srcs {
		prog, done := progress(stderr, "replaying "+s.Label)
		run, err := review.AnalyzeContext(ctx, s, st.tmp, review.Options{Progress: prog, FromNs: span.fromNs, ToNs: span.toNs})
		done()
		if err != nil {
			st.abandon()
			return fmt.Errorf("%s: %w", s.Label, err)
		}
		runs = append(runs, run)
	}
	return writeReports(ctx, stdout, st, "Comparison: "+runs[0].Label+" and "+runs[1].Label, runs...)
}

func writeReports(ctx context.Context, stdout io.Writer, st *staging, title string, runs ...*review.Run) error {
	return writeReport(ctx, stdout, st, true, runs, func(w io.Writer) error { return review.WriteHTMLContext(ctx, w, title, runs...) })
}

// writeReport writes the runs' text summary to summary.txt (and to stdout
// with echo) and the HTML report that html writes to report.html, in the
// staging directory beside the exports of runs, moves them all into the
// output directory, and says where the report is. On an error, or once
// ctx is done (Ctrl-C while the report was drawn: html stops at its next
// figure with ctx's error), it abandons the staging directory, and the
// output directory keeps what it held.
func writeReport(ctx context.Context, stdout io.Writer, st *staging, echo bool, runs []*review.Run, html func(io.Writer) error) error {
	st.place(runs...)
	err := ctx.Err()
	if err == nil {
		err = writeReportFiles(stdout, st.tmp, echo, runs, html)
	}
	if err == nil {
		err = ctx.Err()
	}
	if err != nil {
		st.abandon()
		return err
	}
	if err := st.commit(); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "\nreport: %s\n", filepath.Join(st.dir, "report.html"))
	return nil
}

func writeReportFiles(stdout io.Writer, dir string, echo bool, runs []*review.Run, html func(io.Writer) error) error {
	var txt strings.Builder
	if err := review.WriteText(&txt, runs...); err != nil {
		return err
	}
	if echo {
		io.WriteString(stdout, txt.String())
	}
	if err := os.WriteFile(filepath.Join(dir, "summary.txt"), []byte(txt.String()), 0o644); err != nil {
		return err
	}
	f, err := os.Create(filepath.Join(dir, "report.html"))
	if err != nil {
		return err
	}
	if err := html(f); err != nil {
		f.Close()
		return err
	}
	return f.Close()
}
