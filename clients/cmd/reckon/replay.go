package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"

	"google.golang.org/protobuf/proto"

	"reckon.example/clients/review"
	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("replay", "-journal DIR -robot NAME [-config OTHER.yaml] [flags]\n       reckon replay -config ROBOT.yaml -samples SAMPLES.jsonl [flags]", `
Runs a journal, or a robot configuration and a JSON Lines file, through the
estimator offline and writes the track and every verdict. In csv and table
output a held fix's row shows its final verdict once it was resolved.
-format samples writes the raw samples back as JSON Lines instead, which
"reckon replay -config ROBOT.yaml -samples FILE" takes again. -run N writes
only run N of a robot whose controller restarted (its run start included,
so that its samples replay as a run of their own). A journal that lost
inputs to damage is replayed past each gap, which is named; the exit status
is then 1.`)
	fs.SetOutput(stderr)
	journal := fs.String("journal", "", "journal directory to replay (with -robot)")
	robot := fs.String("robot", "", journalRobotHelp)
	config := fs.String("config", "", "YAML robot configuration: replaces the journal's, or configures -samples")
	samples := fs.String("samples", "", "JSON Lines file of samples, in arrival order (with -config)")
	format := fs.String("format", "csv", "csv, jsonl, or samples (the raw samples as JSON Lines); table also works")
	out := fs.String("out", "", "output file (default standard output)")
	run := fs.Uint64("run", 0, "write only this run, from 1 (default: every run)"+noRunHelp)
	var span timeSpan
	span.add(fs)
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if len(pos) != 0 {
		return usagef(fs, "takes no arguments")
	}
	if err := span.check(fs); err != nil {
		return err
	}
	if err := journalDir(*journal); err != nil {
		return err
	}
	for _, in := range []string{*samples, *config} {
		if *out != "" && in != "" && samePath(in, *out) {
			return usagef(fs, "-out is the input %s; it is never overwritten", in)
		}
	}
	var w io.Writer = stdout
	var lf *lazyFile
	if *out != "" {
		lf = &lazyFile{path: *out}
		w = lf
	}
	var ow outputWriter
	if *format == "samples" {
		ow = &sampleWriter{w: w}
	} else {
		pw, err := newPoseWriter(*format, w)
		if err != nil {
			return usagef(fs, "%v", err)
		}
		ow = &heldWriter{pw: pw, resolve: *format != "jsonl"}
	}
	sw := &spanWriter{next: ow, span: span}
	ow = sw
	rf := &runFilter{next: ow, want: *run}
	var override *pb.RobotConfig
	if *config != "" {
		if override, err = loadYAML(*config); err != nil {
			return err
		}
	}
	switch {
	case *journal != "" && *robot != "":
		err = replayJournal(ctx, *journal, *robot, override, rf, stderr)
	case *samples != "" && override != nil:
		err = replaySamples(ctx, *samples, override, rf, stderr)
	default:
		return usagef(fs, "needs -journal and -robot, or -config and -samples")
	}
	if ferr := ow.flush(); err == nil {
		err = ferr
	}
	if err == nil && rf.want > rf.last {
		err = review.NoRun(rf.want, rf.last)
	}
	if err == nil && span != (timeSpan{}) && sw.inside == 0 {
		err = review.EmptyStretch(span.fromNs, span.toNs, sw.lastNs)
	}
	if lf != nil {
		if cerr := lf.close(err == nil); err == nil {
			err = cerr
		}
	}
	return err
}

// lazyFile creates the file at path at the first write, so that a replay
// that fails before it has anything to write leaves an existing file as it
// was.
type lazyFile struct {
	path string
	f    *os.File
}

func (l *lazyFile) Write(b []byte) (int, error) {
	if len(b) == 0 && l.f == nil {
		return 0, nil
	}
	if err := l.create(); err != nil {
		return 0, err
	}
	return l.f.Write(b)
}

func (l *lazyFile) create() error {
	if l.f != nil {
		return nil
	}
	f, err := os.Create(l.path)
	l.f = f
	return err
}

// close closes the file; done creates it if nothing was written, so that
// a replay that succeeds without a row leaves no older file in its place.
func (l *lazyFile) close(done bool) error {
	if done {
		if err := l.create(); err != nil {
			return err
		}
	}
	if l.f == nil {
		return nil
	}
	return l.f.Close()
}

// runFilter passes on the inputs of one run (want; 0: every run), and the
// responses of the others as outside it (a run start resolves the held
// fixes of the run it ends). The run start that begins the run is its
// first input, so that its samples replay again as a run of their own.
type runFilter struct {
	next outputWriter
	want uint64
	last uint64 // the newest run seen
}

func (rf *runFilter) input(run uint64, s *pb.Sample, p *pb.FusedPose, resp *pb.IngestResponse) error {
	rf.last = max(rf.last, run)
	if rf.want != 0 && run != rf.want {
		return rf.next.outside(resp)
	}
	return rf.next.input(s, p, resp)
}

// outputWriter takes each replayed input with its response and the pose
// after it.
type outputWriter interface {
	input(s *pb.Sample, p *pb.FusedPose, resp *pb.IngestResponse) error
	// outside takes the response to an input that is not written.
	outside(resp *pb.IngestResponse) error
	flush() error
}

// sampleWriter writes the raw samples as JSON Lines.
type sampleWriter struct{ w io.Writer }

func (sw *sampleWriter) input(s *pb.Sample, _ *pb.FusedPose, _ *pb.IngestResponse) error {
	return convert.WriteJSONLine(sw.w, s)
}

func (sw *sampleWriter) outside(*pb.IngestResponse) error { return nil }

func (sw *sampleWriter) flush() error { return nil }

// maxHeldRows bounds the rows kept back while a fix is held; past it they
// are written with the fix still held.
const maxHeldRows = 100000

// heldWriter writes poses and verdicts; with resolve set, it keeps the rows
// back while a fix is held, so that the held fix's row can show the final
// verdict that a later response resolves it to.
type heldWriter struct {
	pw      *poseWriter
	resolve bool
	rows    []heldRow
	held    map[uint64]int // sequence -> index in rows
}

type heldRow struct {
	pose *pb.FusedPose
	resp *pb.IngestResponse
}

func (hw *heldWriter) input(_ *pb.Sample, p *pb.FusedPose, resp *pb.IngestResponse) error {
	if !hw.resolve {
		return hw.pw.pose(p, resp)
	}
	hw.settle(resp)
	if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
		if hw.held == nil {
			hw.held = map[uint64]int{}
		}
		hw.held[resp.GetSequence()] = len(hw.rows)
	}
	if len(hw.held) == 0 && len(hw.rows) == 0 {
		return hw.pw.pose(p, resp)
	}
	hw.rows = append(hw.rows, heldRow{p, resp})
	if len(hw.held) == 0 || len(hw.rows) >= maxHeldRows {
		return hw.flush()
	}
	return nil
}

// settle gives the held rows that resp resolves their final verdict.
func (hw *heldWriter) settle(resp *pb.IngestResponse) {
	for _, r := range resp.GetResolved() {
		if i, ok := hw.held[r.GetSequence()]; ok {
			delete(hw.held, r.GetSequence())
			final := proto.Clone(hw.rows[i].resp).(*pb.IngestResponse)
			final.Verdict, final.Nis, final.Reason = r.GetVerdict(), r.GetNis(), r.GetReason()
			hw.rows[i].resp = final
		}
	}
}

func (hw *heldWriter) outside(resp *pb.IngestResponse) error {
	if !hw.resolve || len(hw.held) == 0 {
		return nil
	}
	hw.settle(resp)
	if len(hw.held) == 0 {
		return hw.flush()
	}
	return nil
}

func (hw *heldWriter) flush() error {
	for _, r := range hw.rows {
		if err := hw.pw.pose(r.pose, r.resp); err != nil {
			return err
		}
	}
	hw.rows, hw.held = hw.rows[:0], nil
	return nil
}

// spanWriter passes on the inputs stamped inside a time span, counted
// from the start of each run (its first input after the run start).
type spanWriter struct {
	next    outputWriter
	span    timeSpan
	started bool
	startNs int64
	inside  int   // inputs passed on, run starts aside
	lastNs  int64 // the latest input's offset from its run's start
}

func (sw *spanWriter) input(s *pb.Sample, p *pb.FusedPose, resp *pb.IngestResponse) error {
	stamp := convert.SampleStamp(s)
	if s.GetRunStart() != nil {
		// It has no stamp; the run's start is its first input's after it,
		// on the restarted controller's clock.
		sw.started = false
		return sw.next.input(s, p, resp)
	}
	if !sw.started {
		sw.started, sw.startNs = true, stamp
	}
	sw.lastNs = max(sw.lastNs, stamp-sw.startNs)
	if !sw.span.holds(stamp - sw.startNs) {
		// It may still resolve a held fix inside the span.
		return sw.next.outside(resp)
	}
	sw.inside++
	return sw.next.input(s, p, resp)
}

func (sw *spanWriter) outside(resp *pb.IngestResponse) error { return sw.next.outside(resp) }

func (sw *spanWriter) flush() error { return sw.next.flush() }

func replayJournal(ctx context.Context, dir, robot string, override *pb.RobotConfig, ow *runFilter, stderr io.Writer) error {
	id, err := journalRobot(robot)
	if err != nil {
		return err
	}
	name := server.RobotName(id)
	// The verdicts replayed as recorded and not; after a gap (inputs lost
	// to damage) the robot lacks what was lost, so they are counted apart.
	same, differ, differPast := 0, 0, 0
	gaps := 0
	fr, scan, err := journal.Replay(dir, id, journal.ReplayOptions{Config: override, ReadOnly: true,
		Input: func(r *journal.Replayed) error {
			if err := ctx.Err(); err != nil {
				return err
			}
			switch {
			case proto.Equal(r.Response, r.Recorded.GetResponse()):
				same++
			case gaps > 0:
				differPast++
			default:
				differ++
			}
			return ow.input(r.Robot.Run(), r.Input.GetSample(), convert.PoseToProto(name, r.Robot.Pose(), r.Robot.Sequence()), r.Response)
		},
		Gap: func(err error) error {
			gaps++
			fmt.Fprintf(stderr, "note: %v; the replay goes on past it without the inputs lost\n", err)
			return nil
		}})
	// A gap is gone past (and named by Gap) only once the journal opened a
	// robot: without one (no segment left) nothing was replayed.
	if err != nil && (fr == nil || !errors.Is(err, journal.ErrGap)) {
		return err
	}
	fmt.Fprintf(stderr, "replayed %d inputs of %s", scan.Pairs, name)
	if override == nil {
		fmt.Fprintf(stderr, ": %d verdicts as recorded, %d different", same, differ+differPast)
	} else {
		fmt.Fprintf(stderr, " with the other configuration: %d verdicts as recorded, %d different", same, differ+differPast)
	}
	if differPast > 0 {
		fmt.Fprintf(stderr, " (%d of them after a gap)", differPast)
	}
	fmt.Fprintln(stderr)
	if scan.Torn != nil {
		fmt.Fprintf(stderr, "note: the journal is truncated: %v (everything before it was replayed)\n", scan.Torn)
	}
	if note := scan.DamageNote(); note != "" {
		fmt.Fprintf(stderr, "note: %s (every intact record around it was replayed)\n", note)
	}
	switch {
	case override == nil && differ > 0 && gaps > 0:
		return fmt.Errorf("replay differs from the journal in %d verdicts before its first gap", differ)
	case override == nil && differ > 0:
		return fmt.Errorf("replay differs from the journal in %d verdicts", differ)
	case gaps == 1:
		return errors.New("the journal lost inputs (the gap named above): the output goes on past it, without those inputs")
	case gaps > 1:
		return fmt.Errorf("the journal lost inputs (%d gaps, named above): the output goes on past them, without those inputs", gaps)
	}
	return nil
}

func replaySamples(ctx context.Context, path string, cfgProto *pb.RobotConfig, ow *runFilter, stderr io.Writer) error {
	cfg, err := convert.ConfigFromProto(cfgProto)
	if err != nil {
		return err
	}
	fr, err := fusion.New(cfg)
	if err != nil {
		return err
	}
	f, err := os.Open(path)
	if err != nil {
		return err
	}
	defer f.Close()
	name := server.RobotName("replay")
	sr := convert.NewSampleReader(f)
	n := 0
	// The verdicts by kind (a held fix's final one once resolved) and, as
	// feed names them, the first refusals with their file and line.
	counts := map[pb.Verdict]int{}
	held := map[uint64]int{} // sequence -> line
	var reasons []string
	reason := func(line int, v pb.Verdict, why string) {
		if why != "" && len(reasons) < 10 {
			reasons = append(reasons, fmt.Sprintf("%s:%d: %s: %s", path, line, convert.VerdictName(v), why))
		}
	}
	for {
		if err := ctx.Err(); err != nil {
			return err
		}
		s, err := sr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			return fmt.Errorf("%s: %w", path, err)
		}
		// As the service would take it (convert.Take: decoding, then the
		// robot, which checks each input first).
		resp, _ := convert.Take(fr, s, 0)
		if err := ow.input(fr.Run(), s, convert.PoseToProto(name, fr.Pose(), fr.Sequence()), resp); err != nil {
			return err
		}
		n++
		counts[resp.GetVerdict()]++
		if resp.GetVerdict() == pb.Verdict_VERDICT_HELD {
			held[resp.GetSequence()] = sr.Line()
		}
		reason(sr.Line(), resp.GetVerdict(), resp.GetReason())
		for _, r := range resp.GetResolved() {
			if line, ok := held[r.GetSequence()]; ok {
				delete(held, r.GetSequence())
				counts[pb.Verdict_VERDICT_HELD]--
				counts[r.GetVerdict()]++
				reason(line, r.GetVerdict(), r.GetReason())
			}
		}
	}
	if n == 0 {
		return fmt.Errorf("%s: %w: no samples", path, convert.ErrJSONL)
	}
	fmt.Fprintf(stderr, "replayed %d samples from %s: %s\n", n, path, verdictLine(counts))
	for _, r := range reasons {
		fmt.Fprintln(stderr, "  "+r)
	}
	return nil
}
