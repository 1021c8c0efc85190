package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
)

func runFeed(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("feed", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	robot := fs.String("robot", "", "robot name, robots/{robot}")
	create := fs.String("create", "", "create the robot first from this YAML configuration (if it does not exist)")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: reckon feed -robot robots/NAME [flags] SAMPLES.jsonl")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		return err
	}
	if *robot == "" || fs.NArg() != 1 {
		fs.Usage()
		return errors.New("feed needs -robot and one JSON Lines file")
	}
	id, err := server.RobotID(*robot)
	if err != nil {
		return err
	}
	f, err := os.Open(fs.Arg(0))
	if err != nil {
		return err
	}
	defer f.Close()
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	if *create != "" {
		b, err := os.ReadFile(*create)
		if err != nil {
			return err
		}
		cfg, _, err := convert.LoadConfigYAML(b)
		if err != nil {
			return fmt.Errorf("%s: %w", *create, err)
		}
		if _, err := c.CreateRobot(ctx, id, cfg); err != nil && status.Code(err) != codes.AlreadyExists {
			return err
		}
	}
	sess, err := c.OpenIngest(ctx, *robot)
	if err != nil {
		return err
	}
	// Send everything while a second goroutine collects the verdicts.
	type tally struct {
		counts  map[pb.Verdict]int
		reasons []string
		err     error
	}
	done := make(chan tally, 1)
	go func() {
		t := tally{counts: map[pb.Verdict]int{}}
		for {
			resp, err := sess.Recv()
			if err != nil {
				if !errors.Is(err, io.EOF) {
					t.err = err
				}
				done <- t
				return
			}
			t.counts[resp.GetVerdict()]++
			for _, r := range resp.GetResolved() {
				t.counts[r.GetVerdict()]++
				t.counts[pb.Verdict_VERDICT_HELD]--
			}
			if resp.GetReason() != "" && len(t.reasons) < 10 {
				t.reasons = append(t.reasons, fmt.Sprintf("client sequence %d: %s", resp.GetClientSequence(), resp.GetReason()))
			}
		}
	}()
	sr := convert.NewSampleReader(f)
	sent := 0
	var readErr error
	for {
		s, err := sr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			readErr = fmt.Errorf("%s: %w", fs.Arg(0), err)
			break
		}
		if _, err := sess.Send(s); err != nil {
			readErr = err
			break
		}
		sent++
	}
	if err := sess.CloseSend(); err != nil && readErr == nil {
		readErr = err
	}
	t := <-done
	var parts []string
	for _, v := range []pb.Verdict{pb.Verdict_VERDICT_APPLIED, pb.Verdict_VERDICT_HELD, pb.Verdict_VERDICT_GATED, pb.Verdict_VERDICT_TOO_OLD, pb.Verdict_VERDICT_INVALID} {
		parts = append(parts, fmt.Sprintf("%s %d", convert.VerdictName(v), t.counts[v]))
	}
	fmt.Fprintf(stdout, "%d samples sent to %s: %s\n", sent, *robot, strings.Join(parts, ", "))
	for _, r := range t.reasons {
		fmt.Fprintln(stdout, "  "+r)
	}
	if readErr != nil {
		return readErr
	}
	return t.err
}
