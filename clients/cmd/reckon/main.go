// Command reckon is the command-line tool of the reckon pose estimator.
//
// Everyday commands, against a running reckond:
//
//	reckon robots   list the robots with their state
//	reckon create   create a robot from a YAML configuration (-replace to change it)
//	reckon delete   delete a robot (its journal is set aside)
//	reckon stats    a robot's statistics: verdict counts, per-sensor consistency
//	reckon pose     a robot's pose, the latest or at a stamp
//	reckon reseed   put a robot at a known pose
//	reckon start-run  start a new run of a robot whose controller restarted
//	reckon feed     stream a JSON Lines file of samples to a robot, paced or not
//	reckon watch    print a robot's fused poses as a table, CSV or JSON Lines
//	reckon link     feed a robot from a microcontroller's frames over a serial port or UDP
//
// Offline and demonstration:
//
//	reckon demo     a simulated greenhouse cart and camera feeding a real server, live
//	reckon replay   run a journal, or a configuration and samples, through the estimator offline
//	reckon review   smoothed track, summary, HTML report with figures and CSV exports of a run
//	reckon compare  the same run under two configurations, side by side
//	reckon export   journals as Parquet tables (runs, inputs, poses, events)
//	reckon imu-noise  IMU noise terms from a static recording by Allan deviation
//	reckon tune     noise levels fitted to a recorded run by the likelihood of its innovations
//	reckon calibrate  wiring diagnosis and wheel scales, track width, sensor mounts and latencies fitted to a run with fixes
//	reckon version  the module version and source revision of this binary
//
// Run "reckon help" for the commands and "reckon <command> -h" for flags;
// -h prints on standard output and exits 0. Flags and arguments may come in
// any order.
//
// # Exit codes
//
//	0    done
//	1    any other failure
//	2    usage: a bad flag or argument, a -journal that names no
//	     directory, or a -run, -from or -to outside the recording (replay,
//	     review, compare, tune, calibrate, export)
//	3    the service is unreachable (gRPC Unavailable)
//	4    no such robot (gRPC NotFound; offline, no journal of it)
//	5    input refused: a bad configuration or samples file, a configuration
//	     that differs from the existing robot's, or a refusal by the service
//	     (gRPC InvalidArgument, FailedPrecondition, AlreadyExists, OutOfRange,
//	     and ResourceExhausted for one of its limits, -max-robots say)
//	130  interrupted by Ctrl-C or SIGTERM; feed, link and watch print a
//	     summary of what they did first
package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strings"
	"syscall"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	err := run(ctx, os.Args[1:], os.Stdin, os.Stdout, os.Stderr)
	stop()
	os.Exit(report(err, os.Stderr))
}

// stdio are a command's standard streams.
type stdio struct {
	in       io.Reader
	out, err io.Writer
}

// command is one reckon command.
type command struct {
	name, summary string
	run           func(ctx context.Context, args []string, std stdio) error
}

// outErr adapts a command that does not read standard input.
func outErr(f func(context.Context, []string, io.Writer, io.Writer) error) func(context.Context, []string, stdio) error {
	return func(ctx context.Context, args []string, std stdio) error { return f(ctx, args, std.out, std.err) }
}

// commands lists the commands in the order of the usage text; a summary
// starting with a newline starts a new group.
func commands() []command {
	return []command{
		{"robots", "list the robots with their state", outErr(runRobots)},
		{"create", "create a robot from a YAML configuration (-replace to change it)", outErr(runCreate)},
		{"delete", "delete a robot; the service sets its journal aside", outErr(runDelete)},
		{"stats", "a robot's statistics: verdict counts, per-sensor consistency", outErr(runStats)},
		{"pose", "a robot's fused pose, the latest or at a stamp", outErr(runPose)},
		{"reseed", "put a robot at a known pose", outErr(runReseed)},
		{"start-run", "start a new run of a robot whose controller restarted (its clock jumped back)", outErr(runStartRun)},
		{"feed", "stream a JSON Lines file of samples to a robot, paced or as fast as possible", runFeed},
		{"watch", "print a robot's fused poses as a table, CSV or JSON Lines; reconnects", outErr(runWatch)},
		{"link", "feed a robot from a microcontroller's frames over a serial port or UDP", outErr(runLink)},
		{"demo", "\nstart a server on loopback, a simulated greenhouse cart and its camera as two gRPC clients, and show the live estimate; leaves the journal", outErr(runDemo)},
		{"replay", "run a journal, or a robot configuration and a JSON Lines file, through the estimator offline and write the track and every verdict", outErr(runReplay)},
		{"review", "replay a recorded run with the smoother: a text summary, an HTML report with figures, and CSV exports of the filtered and smoothed tracks", outErr(runReview)},
		{"compare", "review a run under two configurations side by side", outErr(runCompare)},
		{"imu-noise", "read a static IMU recording's noise from its Allan deviation and write it into a new configuration", outErr(runIMUNoise)},
		{"tune", "fit a configuration's noise levels to a recorded run by the likelihood of its innovations and write a new configuration", outErr(runTune)},
		{"calibrate", "diagnose a recorded run's wiring and fit its wheel scales, track width, sensor mounts and latencies to its fixes, and write a new configuration", outErr(runCalibrate)},
		{"export", "write journals, of one or many robots and runs, as Parquet tables (runs, inputs, poses, events) for data engines", outErr(runExport)},
		{"version", "\nprint the module version and source revision of this binary", outErr(runVersion)},
		{"help", "print this text", nil},
	}
}

// usage is the text of "reckon help".
func usage() string {
	var b strings.Builder
	b.WriteString("usage: reckon <command> [flags] [arguments]\n\ncommands:\n")
	for _, c := range commands() {
		s, group := strings.CutPrefix(c.summary, "\n")
		if group {
			b.WriteString("\n")
		}
		line := fmt.Sprintf("  %-9s", c.name)
		for _, w := range strings.Fields(s) {
			if len(line)+1+len(w) > 80 {
				b.WriteString(line + "\n")
				line = strings.Repeat(" ", 12) + w
				continue
			}
			line += " " + w
		}
		b.WriteString(line + "\n")
	}
	b.WriteString("\n\"reckon <command> -h\" prints a command's flags. Exit codes: 0 done, 1 failure,\n" +
		"2 usage (also a -journal that names no directory, or a -run, -from or -to outside\n" +
		"the recording), 3 service unreachable, 4 no such robot, 5 input refused,\n" +
		"130 interrupted.\n")
	return b.String()
}

// run runs the command args[0] with the rest of args; -h on any command
// prints its usage on stdout and returns nil.
func run(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage())
		return &usageError{err: fmt.Errorf("no command given")}
	}
	if args[0] == "help" || args[0] == "-h" || args[0] == "--help" || args[0] == "-help" {
		fmt.Fprint(stdout, usage())
		return nil
	}
	for _, c := range commands() {
		if c.name == args[0] && c.run != nil {
			err := c.run(ctx, args[1:], stdio{in: stdin, out: stdout, err: stderr})
			switch err {
			case nil:
				return nil
			case errHelp:
				return nil
			}
			return &commandError{name: c.name, err: err}
		}
	}
	fmt.Fprint(stderr, usage())
	return &usageError{err: fmt.Errorf("unknown command %q", args[0])}
}
