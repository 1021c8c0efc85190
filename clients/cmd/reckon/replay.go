package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("replay", "-journal DIR -robot NAME [-config OTHER.yaml] [flags]\n       reckon replay -config ROBOT.yaml -samples SAMPLES.jsonl [flags]", `
Runs a journal, or a robot configuration and a JSON Lines file, through the
estimator offline and writes the track and every verdict.`)
	fs.SetOutput(stderr)
	journal := fs.String("journal", "", "journal directory to replay (with -robot)")
	robot := fs.String("robot", "", "robot id or name in the journal")
	config := fs.String("config", "", "YAML robot configuration: replaces the journal's, or configures -samples")
	samples := fs.String("samples", "", "JSON Lines file of samples, in arrival order (with -config)")
	format := fs.String("format", "csv", "csv or jsonl (table also works)")
	out := fs.String("out", "", "output file (default standard output)")
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if len(pos) != 0 {
		return usagef(fs, "takes no arguments")
	}
	var w io.Writer = stdout
	if *out != "" {
		f, err := os.Create(*out)
		if err != nil {
			return err
		}
		defer f.Close()
		w = f
	}
	pw, err := newPoseWriter(*format, w)
	if err != nil {
		return usagef(fs, "%v", err)
	}
	var override *pb.RobotConfig
	if *config != "" {
		if override, err = loadYAML(*config); err != nil {
			return err
		}
	}
	switch {
	case *journal != "" && *robot != "":
		return replayJournal(ctx, *journal, *robot, override, pw, stderr)
	case *samples != "" && override != nil:
		return replaySamples(ctx, *samples, override, pw, stderr)
	}
	return usagef(fs, "needs -journal and -robot, or -config and -samples")
}

func replayJournal(ctx context.Context, dir, robot string, override *pb.RobotConfig, pw *poseWriter, stderr io.Writer) error {
	id := robot
	if n, err := server.RobotID(robot); err == nil {
		id = n
	}
	name := server.RobotName(id)
	same, differ := 0, 0
	_, scan, err := journal.Replay(dir, id, journal.ReplayOptions{Config: override, ReadOnly: true, Input: func(r *journal.Replayed) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		if proto.Equal(r.Response, r.Recorded.GetResponse()) {
			same++
		} else {
			differ++
		}
		return pw.pose(convert.PoseToProto(name, r.Robot.Pose(), r.Robot.Sequence()), r.Response)
	}})
	if err != nil {
		return err
	}
	fmt.Fprintf(stderr, "replayed %d inputs of %s", scan.Pairs, name)
	if override == nil {
		fmt.Fprintf(stderr, ": %d verdicts as recorded, %d different", same, differ)
	} else {
		fmt.Fprintf(stderr, " with the other configuration: %d verdicts as recorded, %d different", same, differ)
	}
	fmt.Fprintln(stderr)
	if scan.Torn != nil {
		fmt.Fprintf(stderr, "note: the journal is truncated: %v (everything before it was replayed)\n", scan.Torn)
	}
	if override == nil && differ > 0 {
		return fmt.Errorf("replay differs from the journal in %d verdicts", differ)
	}
	return nil
}

func replaySamples(ctx context.Context, path string, cfgProto *pb.RobotConfig, pw *poseWriter, stderr io.Writer) error {
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
		if err := pw.pose(convert.PoseToProto(name, fr.Pose(), fr.Sequence()), resp); err != nil {
			return err
		}
		n++
	}
	fmt.Fprintf(stderr, "replayed %d samples from %s\n", n, path)
	return nil
}
