package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"time"

	"reckon.example/server/convert"
)

func runWatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("watch", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	robot := fs.String("robot", "", "robot name, robots/{robot}")
	format := fs.String("format", "table", "table, csv or jsonl")
	interval := fs.Duration("interval", 100*time.Millisecond, "least time between two poses")
	count := fs.Int("count", 0, "stop after this many poses (0: until interrupted)")
	if err := fs.Parse(args); err != nil {
		return err
	}
	if *robot == "" {
		return errors.New("watch needs -robot robots/NAME")
	}
	pw, err := newPoseWriter(*format, stdout)
	if err != nil {
		return err
	}
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	n := 0
	for resp, err := range c.Watch(ctx, *robot, *interval) {
		if err != nil {
			return err
		}
		if err := pw.pose(resp.GetPose(), nil); err != nil {
			return err
		}
		for _, e := range resp.GetEvents() {
			if *format == "table" {
				fmt.Fprintf(stdout, "  event %s at %.3f s: %s\n", convert.EventName(e.GetKind()), float64(e.GetStampNs())*1e-9, e.GetDetail())
			}
		}
		n++
		if *count > 0 && n >= *count {
			return nil
		}
	}
	return ctx.Err()
}
