package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"strings"

	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"

	"reckon.example/clients/review"
	"reckon.example/server/convert"
	"reckon.example/server/journal"
)

// The exit codes of reckon, documented in the package comment and the README.
const (
	exitOK          = 0   // done
	exitFailure     = 1   // any other failure
	exitUsage       = 2   // bad flags or arguments
	exitUnreachable = 3   // the service did not answer
	exitNotFound    = 4   // no such robot
	exitRefused     = 5   // input refused: a bad configuration or samples file, a differing configuration, a refused reseed, a limit of the service
	exitInterrupted = 130 // interrupted (Ctrl-C or SIGTERM), 128 + SIGINT as shells report it
)

// usageError is a mistake in the command line. shown says that the flag
// package has already printed it with the usage.
type usageError struct {
	err   error
	shown bool
}

func (e *usageError) Error() string { return e.err.Error() }
func (e *usageError) Unwrap() error { return e.err }

// commandError is the error of the command name, which report prints as
// "reckon name: ...".
type commandError struct {
	name string
	err  error
}

func (e *commandError) Error() string { return e.err.Error() }
func (e *commandError) Unwrap() error { return e.err }

// errInterrupted ends a command that was interrupted after it printed its
// summary; main prints nothing more.
var errInterrupted = errors.New("interrupted")

// errRefused marks input the command itself refuses, such as a
// configuration that differs from the existing robot's.
var errRefused = errors.New("refused")

// errHelp is returned by parseArgs after -h printed the usage.
var errHelp = errors.New("help requested")

// exitCode maps an error of run to the process exit code.
func exitCode(err error) int {
	var ue *usageError
	switch {
	case err == nil:
		return exitOK
	case errors.Is(err, errInterrupted), errors.Is(err, context.Canceled):
		return exitInterrupted
	case errors.As(err, &ue), errors.Is(err, review.ErrEmptyStretch), errors.Is(err, journal.ErrNoRun):
		return exitUsage
	case errors.Is(err, journal.ErrNoJournal):
		return exitNotFound
	case errors.Is(err, errRefused), errors.Is(err, convert.ErrConfigFile), errors.Is(err, convert.ErrJSONL), errors.Is(err, review.ErrTruth):
		return exitRefused
	}
	// status.FromError finds a status wrapped anywhere in err.
	if st, ok := status.FromError(err); ok {
		switch st.Code() {
		case codes.Unavailable:
			return exitUnreachable
		case codes.NotFound:
			return exitNotFound
		case codes.InvalidArgument, codes.FailedPrecondition, codes.AlreadyExists, codes.OutOfRange, codes.ResourceExhausted:
			return exitRefused
		case codes.Canceled:
			return exitInterrupted
		}
	}
	return exitFailure
}

// report prints err for people, as main does, and returns the exit code.
// An interruption after a summary, and a usage error the flag package has
// already printed, print nothing more; other interruptions print
// "interrupted" rather than the context's or the stream's error.
func report(err error, stderr io.Writer) int {
	code := exitCode(err)
	prefix := "reckon:"
	var ce *commandError
	if errors.As(err, &ce) {
		prefix = "reckon " + ce.name + ":"
	}
	var ue *usageError
	switch {
	case err == nil, errors.Is(err, errInterrupted), errors.As(err, &ue) && ue.shown:
	case code == exitInterrupted:
		fmt.Fprintln(stderr, prefix, "interrupted")
	default:
		msg := plain(err)
		fmt.Fprintln(stderr, prefix, msg)
		if code == exitUnreachable && strings.Contains(msg, "server preface") {
			fmt.Fprintln(stderr, prefaceHint)
		}
	}
	return code
}

// plain is the text of err with the gRPC status in it, which grpc-go
// renders "rpc error: code = NotFound desc = robot: ... does not exist",
// replaced by its message alone (its code when it has none): the exit
// code tells the status code already.
func plain(err error) string {
	msg := err.Error()
	var gs interface{ GRPCStatus() *status.Status }
	if !errors.As(err, &gs) {
		return msg
	}
	raw, ok := gs.(error)
	if !ok {
		return msg
	}
	st := gs.GRPCStatus()
	desc := st.Message()
	if desc == "" {
		desc = st.Code().String()
	}
	return strings.Replace(msg, raw.Error(), desc, 1)
}

// prefaceHint follows an error of a connection that the other end closed
// before it spoke gRPC: a service that serves TLS does that to a client
// speaking plain text, which grpc-go reports only as "error reading server
// preface: EOF".
const prefaceHint = "reckon: the other end closed the connection before speaking gRPC: if the service serves TLS (reckond -tls-cert), give -tls-ca with the CA that signed its certificate; otherwise check -addr"
