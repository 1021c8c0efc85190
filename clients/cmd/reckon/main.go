// Command reckon is the command-line tool of the reckon pose estimator.
//
//	reckon demo     a simulated greenhouse cart and camera feeding a real server, live
//	reckon feed     stream a JSON Lines file of samples to a robot
//	reckon watch    print a robot's fused poses as a table, CSV or JSON Lines
//	reckon link     feed a robot from a microcontroller's frames over a serial port or UDP
//	reckon replay   run a journal, or a configuration and samples, through the estimator offline
//	reckon review   smoothed track, summary, HTML report with figures and CSV exports of a run
//	reckon compare  the same run under two configurations, side by side
//
// Run "reckon help" for the commands and "reckon <command> -h" for flags.
package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	if err := run(ctx, os.Args[1:], os.Stdout, os.Stderr); err != nil {
		fmt.Fprintln(os.Stderr, "reckon:", err)
		os.Exit(1)
	}
}

const usage = `usage: reckon <command> [flags]

commands:
  demo     start a server on loopback, a simulated greenhouse cart and its camera
           as two gRPC clients, and show the live estimate; leaves the journal
  feed     stream a JSON Lines file of samples to a robot (-create makes it)
  watch    print a robot's fused poses as a table, CSV or JSON Lines
  link     feed a robot from a microcontroller's frames over a serial port or UDP
  replay   run a journal, or a robot configuration and a JSON Lines file, through
           the estimator offline and write the track and every verdict
  review   replay a recorded run with the smoother: a text summary, an HTML report
           with figures, and CSV exports of the filtered and smoothed tracks
  compare  review a run under two configurations side by side
  help     print this text
`

func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return fmt.Errorf("no command given")
	}
	cmds := map[string]func(context.Context, []string, io.Writer, io.Writer) error{
		"demo": runDemo, "feed": runFeed, "watch": runWatch, "link": runLink, "replay": runReplay, "review": runReview, "compare": runCompare,
	}
	if f, ok := cmds[args[0]]; ok {
		return f(ctx, args[1:], stdout, stderr)
	}
	if args[0] == "help" || args[0] == "-h" || args[0] == "--help" {
		fmt.Fprint(stdout, usage)
		return nil
	}
	fmt.Fprint(stderr, usage)
	return fmt.Errorf("unknown command %q", args[0])
}
