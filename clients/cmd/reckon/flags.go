package main

import (
	"bytes"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"

	"reckon.example/server"
	"reckon.example/server/journal"
)

// newFlagSet returns the flag set of a command whose usage is
// "usage: reckon NAME SYNOPSIS", then about, then the flags.
func newFlagSet(name, synopsis, about string) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.Usage = func() {
		w := fs.Output()
		fmt.Fprintf(w, "usage: reckon %s %s\n", name, synopsis)
		if about != "" {
			fmt.Fprintln(w, strings.TrimSpace(about))
		}
		var any bool
		fs.VisitAll(func(*flag.Flag) { any = true })
		if any {
			fmt.Fprintln(w, "\nflags:")
			fs.PrintDefaults()
		}
	}
	return fs
}

// parseArgs parses args, flags and positional arguments in any order ("--"
// ends the flags), and returns the positional arguments. -h or --help
// prints the usage on stdout and returns errHelp; a bad flag prints the
// flag package's message and the usage on stderr and returns a
// *usageError.
func parseArgs(fs *flag.FlagSet, args []string, stdout, stderr io.Writer) ([]string, error) {
	var pos []string
	for {
		var msg bytes.Buffer
		fs.SetOutput(&msg)
		err := fs.Parse(args)
		fs.SetOutput(stderr)
		if errors.Is(err, flag.ErrHelp) {
			fs.SetOutput(stdout)
			fs.Usage()
			fs.SetOutput(stderr)
			return nil, errHelp
		}
		if err != nil {
			stderr.Write(msg.Bytes())
			return nil, &usageError{err: fmt.Errorf("%s: %w", fs.Name(), err), shown: true}
		}
		rest := fs.Args()
		if len(rest) == 0 {
			return pos, nil
		}
		if i := len(args) - len(rest); i > 0 && args[i-1] == "--" {
			return append(pos, rest...), nil
		}
		pos, args = append(pos, rest[0]), rest[1:]
	}
}

// usagef prints fs's usage on stderr and returns a *usageError.
func usagef(fs *flag.FlagSet, format string, args ...any) error {
	fs.Usage()
	return &usageError{err: fmt.Errorf("%s: "+format, append([]any{fs.Name()}, args...)...)}
}

// robotName accepts a robot as NAME or robots/NAME and returns its resource
// name and id; a bad name is a usage error.
func robotName(s string) (name, id string, err error) {
	if !strings.HasPrefix(s, "robots/") {
		s = "robots/" + s
	}
	id, err = server.RobotID(s)
	if err != nil {
		return "", "", &usageError{err: err}
	}
	return s, id, nil
}

// journalRobot returns the journal of an offline command's -robot: a
// robot id or robots/ID, or a deleted robot's {id}.deleted-{unix ns}.
// Anything else can name no journal and is a usage error, as a bad name is
// to export and to the commands that ask the service.
func journalRobot(s string) (string, error) {
	id := strings.TrimPrefix(s, "robots/")
	if _, _, aside := journal.Aside(id); aside {
		return id, nil
	}
	if _, err := server.RobotID("robots/" + id); err != nil {
		return "", &usageError{err: fmt.Errorf("-robot: %w, nor a deleted robot's journal ({id}.deleted-{unix ns})", err)}
	}
	return id, nil
}

// journalDir refuses a -journal that names no directory, as a usage error
// naming it: a mistyped path is a mistake in the command line, as a bad
// -robot is. An empty dir (no -journal) passes; other errors of the file
// system are left to the reading, which names them.
func journalDir(dir string) error {
	if dir == "" {
		return nil
	}
	st, err := os.Stat(dir)
	switch {
	case errors.Is(err, os.ErrNotExist):
		return &usageError{err: fmt.Errorf("-journal %s: no such directory", dir)}
	case err == nil && !st.IsDir():
		return &usageError{err: fmt.Errorf("-journal %s: not a directory", dir)}
	}
	return nil
}

// parseNone parses the flags of a command that takes no positional
// arguments.
func parseNone(fs *flag.FlagSet, args []string, stdout, stderr io.Writer) error {
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err == nil && len(pos) != 0 {
		err = usagef(fs, "takes no arguments, got %q", pos[0])
	}
	return err
}

// noRunHelp ends the help of the -run flag of the tools that read a
// recording.
const noRunHelp = ". A run the recording does not hold is a usage error (exit 2)"

// journalRobotHelp is the help of the -robot flag of the tools that read a
// journal.
const journalRobotHelp = "robot id or name in the journal; a deleted robot's journal is {id}.deleted-{unix ns}, the suffix its files carry"
