package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"
	"time"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/clients/bridge"
	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server"
	"reckon.example/server/convert"
)

// verdictWait bounds the wait for the last verdicts after Ctrl-C.
const verdictWait = 10 * time.Second

func runLink(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := flag.NewFlagSet("link", flag.ContinueOnError)
	fs.SetOutput(stderr)
	cf := addConnFlags(fs)
	port := fs.String("serial", "", "serial port of the controller, for instance /dev/ttyACM0")
	baud := fs.Int("baud", 115200, "serial bit rate (8 data bits, no parity, one stop bit)")
	udp := fs.String("udp", "", "listen for frames in UDP datagrams on host:port, for instance 0.0.0.0:7461")
	robot := fs.String("robot", "", "robot name, robots/{robot}")
	create := fs.String("create", "", "create the robot first from this YAML configuration (if it does not exist)")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: reckon link (-serial DEVICE [-baud N] | -udp HOST:PORT) -robot robots/NAME [flags]")
		fmt.Fprintln(stderr, "Reads reckon link frames from a microcontroller (clients/bridge/PROTOCOL.md) and")
		fmt.Fprintln(stderr, "sends their odometry to the robot until interrupted; prints a summary at the end.")
		fs.PrintDefaults()
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return nil
		}
		return err
	}
	if *robot == "" || (*port == "") == (*udp == "") || fs.NArg() != 0 {
		fs.Usage()
		return errors.New("link needs -robot and one of -serial and -udp")
	}
	id, err := server.RobotID(*robot)
	if err != nil {
		return err
	}
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
	// The session outlives ctx so that the verdicts of the samples sent
	// before Ctrl-C still arrive, for verdictWait at most.
	sessCtx, cancelSess := context.WithCancel(context.WithoutCancel(ctx))
	defer cancelSess()
	stopWait := context.AfterFunc(ctx, func() { time.AfterFunc(verdictWait, cancelSess) })
	defer stopWait()
	sess, err := c.OpenIngest(sessCtx, *robot)
	if err != nil {
		return err
	}
	fmt.Fprintf(stderr, "linking %s to %s; interrupt to stop\n", from, *robot)
	var dec bridge.Decoder
	sum, err := bridge.Forward(ctx, src, &dec, sess)
	printLinkSummary(stdout, *robot, sum)
	return err
}

func printLinkSummary(w io.Writer, robot string, sum bridge.Summary) {
	st := sum.Stats
	fmt.Fprintf(w, "frames: %d ok, %d corrupted, %d invalid, %d duplicates, %d reordered, %d skipped, %d restarts\n",
		st.Frames, st.Corrupted, st.Invalid, st.Duplicates, st.Reordered, st.Skipped, st.Restarts)
	var parts []string
	for _, v := range []pb.Verdict{pb.Verdict_VERDICT_APPLIED, pb.Verdict_VERDICT_HELD, pb.Verdict_VERDICT_GATED, pb.Verdict_VERDICT_TOO_OLD, pb.Verdict_VERDICT_INVALID} {
		parts = append(parts, fmt.Sprintf("%s %d", convert.VerdictName(v), sum.Verdicts[v]))
	}
	fmt.Fprintf(w, "%d samples sent to %s: %s\n", sum.Sent, robot, strings.Join(parts, ", "))
	for _, r := range sum.Reasons {
		fmt.Fprintln(w, "  "+r)
	}
}
