package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"

	"google.golang.org/protobuf/proto"

	"reckon.example/fusion"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

func runReplay(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("replay", flag.ContinueOnError)
	fs.SetOutput(stderr)
	journal := fs.String("journal", "", "journal directory to replay (with -robot)")
	robot := fs.String("robot", "", "robot id or name in the journal")
	config := fs.String("config", "", "YAML robot configuration: replaces the journal's, or configures -samples")
	samples := fs.String("samples", "", "JSON Lines file of samples, in arrival order (with -config)")
	format := fs.String("format", "csv", "csv or jsonl (table also works)")
	out := fs.String("out", "", "output file (default standard output)")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: reckon replay -journal DIR -robot NAME [-config OTHER.yaml] [flags]\n       reckon replay -config ROBOT.yaml -samples SAMPLES.jsonl [flags]")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return err
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
		return err
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
	fs.Usage()
	return errors.New("replay needs -journal and -robot, or -config and -samples")
}

// replayer runs inputs through a robot as the service would (convert.Take:
// decoding, then the robot, which checks each input first).
type replayer struct {
	name string
	fr   *fusion.Robot
	pw   *poseWriter
}

func (rp *replayer) input(s *pb.Sample) (*pb.IngestResponse, error) {
	resp, _ := convert.Take(rp.fr, s, 0)
	return resp, rp.pw.pose(convert.PoseToProto(rp.name, rp.fr.Pose(), rp.fr.Sequence()), resp)
}

func replayJournal(ctx context.Context, dir, robot string, override *pb.RobotConfig, pw *poseWriter, stderr io.Writer) error {
	id := robot
	if n, err := journal.ID(robot); err == nil {
		id = n
	}
	rp := &replayer{name: "robots/" + id, pw: pw}
	same, differ := 0, 0
	scan, err := journal.Read(dir, id, journal.Visitor{Opening: func(op *pb.JournalOpening) error {
		c := op.GetConfig()
		if override != nil {
			c = override
		}
		cfg, err := convert.ConfigFromProto(c)
		if err != nil {
			return err
		}
		rp.fr, err = fusion.New(cfg)
		return err
	}, Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		if err := ctx.Err(); err != nil {
			return err
		}
		resp, err := rp.input(in.GetSample())
		if err != nil {
			return err
		}
		resp.ClientSequence = out.GetResponse().GetClientSequence()
		if proto.Equal(resp, out.GetResponse()) {
			same++
		} else {
			differ++
		}
		return nil
	}})
	if err != nil {
		return err
	}
	fmt.Fprintf(stderr, "replayed %d inputs of %s", scan.Pairs, rp.name)
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
	rp := &replayer{name: "robots/replay", fr: fr, pw: pw}
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
		if _, err := rp.input(s); err != nil {
			return err
		}
		n++
	}
	fmt.Fprintf(stderr, "replayed %d samples from %s\n", n, path)
	return nil
}
