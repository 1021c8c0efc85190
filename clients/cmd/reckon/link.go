package main

import (
	"context"
	"fmt"
	"io"
	"time"

	"google.golang.org/grpc/status"

	"reckon.example/clients/bridge"
	"reckon.example/clients/client"
)

// verdictWait bounds the wait for the last verdicts after Ctrl-C.
const verdictWait = 10 * time.Second

func runLink(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("link", "(-serial DEVICE [-baud N] | -udp HOST:PORT) -robot NAME [flags]", `
Reads reckon link frames from a microcontroller (clients/bridge/PROTOCOL.md) and
sends their odometry to the robot until interrupted; prints a summary at the end
and exits 130. A controller restart (its boot byte changes, its clock and counts
start again) begins a new run of the robot (boot id link-boot-{byte}), as
"reckon start-run" does by hand.`)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	port := fs.String("serial", "", "serial port of the controller, for instance /dev/ttyACM0")
	baud := fs.Int("baud", 115200, "serial bit rate (8 data bits, no parity, one stop bit); only with -serial")
	udp := fs.String("udp", "", "listen for frames in UDP datagrams on host:port, for instance 0.0.0.0:7461")
	robot := fs.String("robot", "", "robot: NAME or robots/NAME (required)")
	create, replace := addCreateFlags(fs, "create", "create the robot first from this YAML configuration; an existing robot must have the same one (or -replace)")
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if *robot == "" || (*port == "") == (*udp == "") || len(pos) != 0 {
		return usagef(fs, "needs -robot and one of -serial and -udp")
	}
	if *replace && *create == "" {
		return usagef(fs, "-replace needs -create")
	}
	if *udp != "" && isSet(fs, "baud") {
		return usagef(fs, "-baud is for -serial; a UDP datagram has no bit rate")
	}
	if *baud <= 0 {
		return usagef(fs, "-baud must be a positive bit rate, got %d", *baud)
	}
	name, id, err := robotName(*robot)
	if err != nil {
		return err
	}
	// The port first: a mistyped one must not leave a robot created (or
	// replaced) behind.
	var src io.ReadCloser
	from := *port
	if *port != "" {
		src, err = bridge.OpenSerial(*port, *baud)
	} else {
		var u *bridge.UDPSource
		u, err = bridge.ListenUDP(*udp)
		if err == nil {
			src, from = u, "udp "+u.Addr().String()
		}
	}
	if err != nil {
		return err
	}
	defer src.Close()
	c, err := cf.dial()
	if err != nil {
		return err
	}
	defer c.Close()
	if err := createFirst(ctx, c, id, *create, *replace, stderr); err != nil {
		return err
	}
	sessCtx, stop := sessionContext(ctx)
	defer stop()
	sess, err := c.OpenIngest(sessCtx, name)
	if err != nil {
		return err
	}
	fmt.Fprintf(stderr, "linking %s to %s; interrupt to stop\n", from, name)
	var dec bridge.Decoder
	// A controller that restarted while no bridge listened begins a new
	// run too: the robot's current run names the boot it came from.
	r, err := c.GetRobot(ctx, name)
	if err != nil {
		return err
	}
	dec.Resume(r.GetBootId(), r.GetNewestStampNs())
	// The service's restarts (an upgrade, a crash) do not end the link: it
	// opens the session again and goes on.
	reopen := func(ctx context.Context, id string, last uint64) (*client.Session, error) {
		return c.OpenIngest(sessCtx, name, client.Resume(id, last))
	}
	sum, err := bridge.Forward(ctx, src, &dec, sess, bridge.Reconnect(reopen, stderr))
	printLinkSummary(stdout, name, sum)
	if _, fromService := status.FromError(err); !fromService {
		// With Reconnect, Forward fails otherwise only on reading its
		// source.
		err = fmt.Errorf("reading %s: %w", from, err)
	}
	if ctx.Err() != nil && (err == nil || exitCode(err) == exitInterrupted) {
		return errInterrupted
	}
	return err
}

func printLinkSummary(w io.Writer, robot string, sum bridge.Summary) {
	st := sum.Stats
	fmt.Fprintf(w, "frames: %d ok, %d corrupted, %d invalid, %d duplicates, %d reordered, %d skipped, %d restarts\n",
		st.Frames, st.Corrupted, st.Invalid, st.Duplicates, st.Reordered, st.Skipped, st.Restarts)
	if st.Held > 0 {
		fmt.Fprintf(w, "%d frames held at the end, not sent: no later frame of their boot confirmed them\n", st.Held)
	}
	notTaken := ""
	if sum.NotTaken > 0 {
		notTaken = fmt.Sprintf(", not taken %d (the robot was paused: see its state)", sum.NotTaken)
	}
	fmt.Fprintf(w, "%d samples sent to %s: %s%s\n", sum.Sent, robot, verdictLine(sum.Verdicts), notTaken)
	if sum.Reconnects > 0 {
		times := "times"
		if sum.Reconnects == 1 {
			times = "time"
		}
		fmt.Fprintf(w, "the service ended the stream %d %s; %d samples dropped while it was not open\n", sum.Reconnects, times, sum.Dropped)
	}
	for _, r := range sum.Reasons {
		fmt.Fprintln(w, "  "+r)
	}
	for _, d := range sum.Drops {
		fmt.Fprintln(w, "  first of its kind: "+d)
	}
}
