package main

import (
	"context"
	"fmt"
	"io"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

// The pauses between reconnection attempts grow from watchRetryMin to
// watchRetryMax.
const (
	watchRetryMin = 100 * time.Millisecond
	watchRetryMax = 5 * time.Second
)

func runWatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("watch", "-robot NAME [flags]", `
Prints a robot's fused poses as they change, as a table, CSV or JSON Lines.
When the service goes away it reconnects, with growing pauses, for up to
-reconnect, and says so on standard error. When the robot is deleted it
exits 4. Interrupted, it prints how many poses it printed and exits 130.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	robot := fs.String("robot", "", "robot: NAME or robots/NAME (required)")
	format := fs.String("format", "table", "table, csv or jsonl")
	interval := fs.Duration("interval", 100*time.Millisecond, "least time between two poses")
	count := fs.Int("count", 0, "stop after this many poses (0: until interrupted)")
	reconnect := fs.Duration("reconnect", 10*time.Minute, "how long to keep trying to reconnect after losing the service (0: exit at once)")
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if *robot == "" || len(pos) != 0 {
		return usagef(fs, "needs -robot NAME")
	}
	if *count < 0 || *interval < 0 || *reconnect < 0 {
		return usagef(fs, "-count %d, -interval %v, -reconnect %v: none may be negative", *count, *interval, *reconnect)
	}
	name, _, err := robotName(*robot)
	if err != nil {
		return err
	}
	pw, err := newPoseWriter(*format, stdout)
	if err != nil {
		return usagef(fs, "%v", err)
	}
	w := watcher{name: name, format: *format, pw: pw, stdout: stdout, count: *count}
	var lostAt time.Time // when the service went away; zero while connected
	retry := watchRetryMin
	for {
		c, err := cf.dial()
		if err != nil {
			return err
		}
		got, err := w.stream(c.Watch(ctx, name, *interval), func() {
			if !lostAt.IsZero() {
				fmt.Fprintf(stderr, "reckon watch: reconnected to %s after %s\n", name, time.Since(lostAt).Round(time.Millisecond))
				lostAt, retry = time.Time{}, watchRetryMin
				w.reconnects++
			}
		})
		c.Close()
		switch {
		case ctx.Err() != nil || endedByContext(ctx, err):
			w.summary(stderr)
			return errInterrupted
		case err == nil && w.count > 0 && w.n >= w.count:
			return nil
		case err == nil:
			// The service ended the stream: it is stopping (a deleted
			// robot's watch ends with NOT_FOUND, below).
			err = status.Error(codes.Unavailable, "the service ended the stream")
		}
		switch {
		case status.Code(err) != codes.Unavailable:
			return err // the robot is gone, the token refused, ...
		case !got && lostAt.IsZero() && w.n == 0:
			return err // never connected: the service is not there
		}
		if *reconnect <= 0 {
			return err
		}
		if lostAt.IsZero() {
			lostAt = time.Now()
			fmt.Fprintf(stderr, "reckon watch: lost %s: %s; reconnecting for up to %s\n", name, status.Convert(err).Message(), *reconnect)
		}
		if time.Since(lostAt) > *reconnect {
			return fmt.Errorf("gave up reconnecting to %s after %s: %w", name, *reconnect, err)
		}
		tm := time.NewTimer(retry)
		select {
		case <-ctx.Done():
			tm.Stop()
			w.summary(stderr)
			return errInterrupted
		case <-tm.C:
		}
		retry = min(2*retry, watchRetryMax)
	}
}

// watcher prints the poses of one watch across reconnections.
type watcher struct {
	name       string
	format     string
	pw         *poseWriter
	stdout     io.Writer
	count      int // stop after this many poses (0: never)
	n          int // poses printed
	reconnects int
}

// stream prints the poses of one Watch stream until it ends, w.count is
// reached or the stream's context is done; first is called on its first pose. got says
// whether any pose arrived; err is the stream's error (nil: it ended).
func (w *watcher) stream(seq func(func(*pb.WatchResponse, error) bool), first func()) (got bool, err error) {
	for resp, err := range seq {
		if err != nil {
			return got, err
		}
		if !got {
			first()
			got = true
		}
		if err := w.pw.pose(resp.GetPose(), nil); err != nil {
			return got, err
		}
		if w.format == "table" {
			for _, e := range resp.GetEvents() {
				fmt.Fprintf(w.stdout, "  event %s at %.3f s: %s\n", convert.EventName(e.GetKind()), float64(e.GetStampNs())*1e-9, e.GetDetail())
			}
		}
		w.n++
		if w.count > 0 && w.n >= w.count {
			return got, nil
		}
	}
	return got, nil
}

func (w *watcher) summary(stderr io.Writer) {
	fmt.Fprintf(stderr, "reckon watch: %d poses of %s printed, %d reconnections\n", w.n, w.name, w.reconnects)
}

// endedByContext reports whether a stream's end came from the end of ctx
// itself. The service sees a deadline that gRPC sent with the call a
// moment before ctx's own timer fires, and ends the stream with a
// DeadlineExceeded or Canceled status, or cleanly, so such an end is given
// up to a second for ctx to end (a clean end only when ctx's deadline is
// that near).
func endedByContext(ctx context.Context, err error) bool {
	switch c := status.Code(err); {
	case err == nil:
		if d, ok := ctx.Deadline(); !ok || time.Until(d) > time.Second {
			return false
		}
	case c != codes.DeadlineExceeded && c != codes.Canceled:
		return false
	}
	t := time.NewTimer(time.Second)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return true
	case <-t.C:
		return false
	}
}
