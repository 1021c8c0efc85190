package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"

	"reckon.example/clients/client"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
)

// ensureRobot makes robots/{id} exist with the configuration in the YAML
// file path, for create, feed -create and link -create. An existing robot
// with the same configuration (proto.Equal) is left alone; one with a
// different configuration is refused unless replace, which deletes it (the
// service sets its journal aside) and creates it anew. It returns what it
// did: "created", "unchanged" or "replaced".
func ensureRobot(ctx context.Context, c *client.Client, id, path string, replace bool) (string, error) {
	cfg, err := loadYAML(path)
	if err != nil {
		return "", err
	}
	_, err = c.CreateRobot(ctx, id, cfg)
	if err == nil {
		return "created", nil
	}
	if status.Code(err) != codes.AlreadyExists {
		return "", err
	}
	name := server.RobotName(id)
	r, err := c.GetRobot(ctx, name)
	if err != nil {
		return "", err
	}
	if proto.Equal(r.GetConfig(), cfg) {
		return "unchanged", nil
	}
	if !replace {
		return "", fmt.Errorf("%w: %s exists with another configuration than %s (it differs in %s); -replace deletes the robot, setting its journal aside, and creates it anew",
			errRefused, name, path, strings.Join(convert.DifferingFields(r.GetConfig(), cfg), ", "))
	}
	if err := c.DeleteRobot(ctx, name); err != nil {
		return "", err
	}
	if _, err := c.CreateRobot(ctx, id, cfg); err != nil {
		return "", err
	}
	return "replaced", nil
}

// createFirst is the -create of feed and link: ensureRobot if path is set,
// saying on stderr what it changed.
func createFirst(ctx context.Context, c *client.Client, id, path string, replace bool, stderr io.Writer) error {
	if path == "" {
		return nil
	}
	did, err := ensureRobot(ctx, c, id, path, replace)
	if err == nil && did != "unchanged" {
		fmt.Fprintf(stderr, "%s %s\n", server.RobotName(id), did)
	}
	return err
}

// addCreateFlags adds -create (or, for the create command, -config) and
// -replace.
func addCreateFlags(fs *flag.FlagSet, name, help string) (path *string, replace *bool) {
	return fs.String(name, "", help),
		fs.Bool("replace", false, "if the robot exists with another configuration, delete it (its journal is set aside) and create it anew; without it a differing configuration is refused")
}

// oneRobot parses the flags of a command that takes one robot NAME.
func oneRobot(fs *flag.FlagSet, args []string, stdout, stderr io.Writer) (name, id string, err error) {
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return "", "", err
	}
	if len(pos) != 1 {
		return "", "", usagef(fs, "needs one robot NAME")
	}
	return robotName(pos[0])
}

func runCreate(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("create", "NAME -config ROBOT.yaml [-replace] [flags]", `
Creates robots/NAME from a YAML robot configuration. If the robot exists with
the same configuration nothing changes; with another one, create refuses
(exit 5) unless -replace.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	cfgPath, replace := addCreateFlags(fs, "config", "YAML robot configuration (required)")
	name, id, err := oneRobot(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if *cfgPath == "" {
		return usagef(fs, "needs -config ROBOT.yaml")
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	did, err := ensureRobot(ctx, c, id, *cfgPath, *replace)
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "%s %s\n", name, did)
	return nil
}

func runDelete(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("delete", "NAME [flags]", "Deletes robots/NAME; the service closes its journal and sets it aside,\nevery record kept: reckon export reads it, and replay and review read it\nas -robot NAME.deleted-{unix ns}, the suffix its files carry. A quarantined\nrobot's journal is set aside as it is, damage and all; create the robot\nagain to put it back to work.")
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	name, _, err := oneRobot(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	if err := c.DeleteRobot(ctx, name); err != nil {
		return err
	}
	fmt.Fprintf(stdout, "%s deleted\n", name)
	return nil
}

func runRobots(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("robots", "[flags]", `
Lists the service's robots: the current run (from 1; a controller restart
starts the next), inputs taken, the stamp of the newest odometry (seconds on
the current run's time base) and the state: "trusted", the reasons not to
trust the estimate, or why the service cannot serve the robot.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if len(pos) != 0 {
		return usagef(fs, "takes no arguments")
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	tw := tabwriter.NewWriter(stdout, 0, 8, 2, ' ', 0)
	fmt.Fprintln(tw, "ROBOT\tRUN\tINPUTS\tNEWEST_S\tSTATE")
	for r, err := range c.ListRobots(ctx, 0) {
		if err != nil {
			return err
		}
		state, err := robotState(ctx, c, r)
		if err != nil {
			return err
		}
		fmt.Fprintf(tw, "%s\t%d\t%d\t%.3f\t%s\n", r.GetName(), r.GetRun(), r.GetInputCount(), float64(r.GetNewestStampNs())*1e-9, state)
	}
	return tw.Flush()
}

// robotState is one word or phrase for the robots listing.
func robotState(ctx context.Context, c *client.Client, r *pb.Robot) (string, error) {
	if s := r.GetState(); s == pb.RobotState_ROBOT_STATE_PAUSED || s == pb.RobotState_ROBOT_STATE_QUARANTINED {
		return convert.RobotStateName(s) + ": " + r.GetStateDetail(), nil
	}
	st, err := c.Statistics(ctx, r.GetName())
	switch status.Code(err) {
	case codes.OK:
	case codes.Unavailable, codes.Canceled:
		return "", err
	default:
		// A robot the service holds but cannot serve, such as one whose
		// journal could not be restored.
		return "unavailable: " + status.Convert(err).Message(), nil
	}
	state := "trusted"
	if len(st.GetDistrust()) > 0 {
		var why []string
		for _, d := range st.GetDistrust() {
			why = append(why, convert.DistrustName(d))
		}
		state = "not trusted: " + strings.Join(why, ", ")
	}
	if r.GetInputCount() == 0 {
		state = "no inputs yet"
	}
	if st.GetHeld() > 0 {
		state += fmt.Sprintf(" (%d held)", st.GetHeld())
	}
	return state, nil
}

func runStats(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("stats", "NAME [flags]", `
Prints robots/NAME's running statistics: odometry and measurement verdicts,
each sensor's verdicts and the consistency of its mean NIS with the 95% band
of a consistent filter, slips, gaps, move recoveries and trust. The verdict
counts are totals; "held" counts fixes held on arrival, each counted again
under its final verdict once resolved, and the last line the samples
waiting for odometry now.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	jsonl := fs.Bool("json", false, "print the statistics as one line of JSON (proto field names)")
	name, _, err := oneRobot(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	st, err := c.Statistics(ctx, name)
	if err != nil {
		return err
	}
	if *jsonl {
		return convert.WriteJSONLine(stdout, st)
	}
	return printStats(stdout, name, st)
}

var countedVerdicts = []pb.Verdict{pb.Verdict_VERDICT_APPLIED, pb.Verdict_VERDICT_HELD, pb.Verdict_VERDICT_GATED, pb.Verdict_VERDICT_TOO_OLD, pb.Verdict_VERDICT_INVALID}

func countsOf(v *pb.VerdictCounts) []uint64 {
	return []uint64{v.GetApplied(), v.GetHeld(), v.GetGated(), v.GetTooOld(), v.GetInvalid()}
}

func printStats(w io.Writer, name string, st *pb.RobotStatistics) error {
	labels := []string{"odometry", "measurements"}
	rows := []*pb.VerdictCounts{st.GetOdometry(), st.GetMeasurements()}
	for _, s := range st.GetSensors() {
		labels = append(labels, "sensor "+s.GetSensorId())
		rows = append(rows, s.GetCounts())
	}
	width := len(name)
	for _, l := range labels {
		width = max(width, len(l))
	}
	fmt.Fprintf(w, "%-*s", width, name)
	for _, v := range countedVerdicts {
		fmt.Fprintf(w, " %8s", convert.VerdictName(v))
	}
	fmt.Fprintln(w)
	for i, c := range rows {
		fmt.Fprintf(w, "%-*s", width, labels[i])
		for _, n := range countsOf(c) {
			fmt.Fprintf(w, " %8d", n)
		}
		fmt.Fprintln(w)
	}
	// The held column counts first verdicts, not the samples held now,
	// which the last line gives.
	fmt.Fprintln(w, "(held: held on arrival, in all; each is counted again under its final verdict once resolved)")
	if len(st.GetSensors()) > 0 {
		fmt.Fprintln(w, "\nconsistency (mean NIS of applied fixes against its two-sided 95% band):")
		tw := tabwriter.NewWriter(w, 0, 8, 2, ' ', 0)
		for _, s := range st.GetSensors() {
			fmt.Fprintf(tw, "  %s\tmean NIS %.3f\tband [%.3f, %.3f]\t%s%s\n", s.GetSensorId(), s.GetMeanNis(), s.GetBandLow(), s.GetBandHigh(), convert.ConsistencyName(s.GetVerdict()), gatedWhy(s))
		}
		tw.Flush()
	}
	trust := "trusted"
	if len(st.GetDistrust()) > 0 {
		var why []string
		for _, d := range st.GetDistrust() {
			why = append(why, convert.DistrustName(d))
		}
		trust = "not trusted: " + strings.Join(why, ", ")
	}
	_, err := fmt.Fprintf(w, "\nslips %d, gaps %d, move recoveries %d, samples waiting for odometry now %d, window entries %d\n%s\n",
		st.GetSlips(), st.GetGaps(), st.GetRecoveries(), st.GetHeld(), st.GetWindowEntries(), trust)
	return err
}

// gatedWhy says why a sensor whose mean NIS lies inside its band is
// overconfident: its gate refused more of its fixes than it allows
// (fusion.SensorStats.Consistency), which the band alone does not show.
func gatedWhy(s *pb.SensorConsistency) string {
	if s.GetVerdict() != pb.ConsistencyVerdict_CONSISTENCY_VERDICT_OVERCONFIDENT || s.GetMeanNis() > s.GetBandHigh() {
		return ""
	}
	c := s.GetCounts()
	return fmt.Sprintf(" (%d of %d fixes gated, more than its gate allows)", c.GetGated(), c.GetApplied()+c.GetGated())
}

// isSet reports whether the flag name was given on the command line.
func isSet(fs *flag.FlagSet, name string) bool {
	set := false
	fs.Visit(func(f *flag.Flag) { set = set || f.Name == name })
	return set
}

// newestStamp is the stamp of the robot's newest odometry, nanoseconds.
func newestStamp(ctx context.Context, c *client.Client, name string) (int64, error) {
	r, err := c.GetRobot(ctx, name)
	if err != nil {
		return 0, err
	}
	return r.GetNewestStampNs(), nil
}

func runPose(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("pose", "NAME [-at STAMP_NS] [flags]", `
Prints robots/NAME's fused pose at the stamp of its newest odometry, or at
-at: inside the history window the filtered estimate, a little past the
newest odometry an extrapolation. A stamp out of range is refused (exit 5).`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	at := fs.Int64("at", 0, "stamp, nanoseconds on the robot's time base (default: its newest odometry)")
	format := fs.String("format", "table", "table, csv or jsonl")
	name, _, err := oneRobot(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	pw, err := newPoseWriter(*format, stdout)
	if err != nil {
		return usagef(fs, "%v", err)
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	stamp := *at
	if !isSet(fs, "at") {
		if stamp, err = newestStamp(ctx, c, name); err != nil {
			return err
		}
	}
	p, err := c.PoseAt(ctx, name, stamp)
	if err != nil {
		return err
	}
	return pw.pose(p, nil)
}

func runReseed(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("reseed", "NAME -x X_M -y Y_M -heading RAD [-std-m M -std-rad RAD | -cov C1,...,C9] [-at STAMP_NS] [flags]", `
Puts robots/NAME at a known pose in the field frame: its estimate restarts
from it at the stamp -at (default: its newest odometry); samples stamped
before are no longer taken. A reseed the robot refuses exits 5.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	pf := addPoseFlags(fs, "(required)")
	at := fs.Int64("at", 0, "stamp, nanoseconds on the robot's time base (default: its newest odometry)")
	name, _, err := oneRobot(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if !pf.given(fs) {
		return usagef(fs, "needs -x, -y and -heading")
	}
	pose, cov, err := pf.read(fs)
	if err != nil {
		return err
	}
	x, y, heading := pose.GetXM(), pose.GetYM(), pose.GetHeadingRad()
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	stamp := *at
	if !isSet(fs, "at") {
		if stamp, err = newestStamp(ctx, c, name); err != nil {
			return err
		}
	}
	resp, err := c.Reseed(ctx, name, stamp, pose, cov)
	if err != nil {
		return err
	}
	if resp.GetVerdict() != pb.Verdict_VERDICT_APPLIED {
		return fmt.Errorf("%w: reseed of %s at %d ns %s: %s", errRefused, name, stamp, convert.VerdictName(resp.GetVerdict()), resp.GetReason())
	}
	fmt.Fprintf(stdout, "%s reseeded at %.3f s to x %.3f m, y %.3f m, heading %.1f deg (input %d)\n",
		name, float64(stamp)*1e-9, x, y, heading*180/math.Pi, resp.GetSequence())
	return nil
}

// parseCov reads 9 comma-separated numbers.
func parseCov(s string) ([]float64, error) {
	parts := strings.Split(s, ",")
	if len(parts) != 9 {
		return nil, fmt.Errorf("%d values, want 9", len(parts))
	}
	cov := make([]float64, 9)
	for i, p := range parts {
		v, err := strconv.ParseFloat(strings.TrimSpace(p), 64)
		if err != nil {
			return nil, fmt.Errorf("value %d, %q, is not a number", i+1, p)
		}
		cov[i] = v
	}
	return cov, nil
}
