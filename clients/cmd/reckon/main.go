// Command reckon is the command-line tool of the reckon pose estimator.
//
//	reckon demo [flags]   run the simulated greenhouse cart through the estimator
//
// Run "reckon help" for the commands and "reckon demo -h" for their flags.
package main

import (
	"context"
	"fmt"
	"io"
	"os"
	"os/signal"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	if err := run(ctx, os.Args[1:], os.Stdout, os.Stderr); err != nil {
		fmt.Fprintln(os.Stderr, "reckon:", err)
		os.Exit(1)
	}
}

const usage = `usage: reckon <command> [flags]

commands:
  demo    run the simulated greenhouse cart through the estimator and print
          its fused track, uncertainty and error against the simulator's truth
  help    print this text
`

func run(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	if len(args) == 0 {
		fmt.Fprint(stderr, usage)
		return fmt.Errorf("no command given")
	}
	switch args[0] {
	case "demo":
		return runDemo(ctx, args[1:], stdout, stderr)
	case "help", "-h", "--help":
		fmt.Fprint(stdout, usage)
		return nil
	}
	fmt.Fprint(stderr, usage)
	return fmt.Errorf("unknown command %q", args[0])
}
