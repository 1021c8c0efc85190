package main

import (
	"context"
	"fmt"
	"io"
	"runtime/debug"
)

func runVersion(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("version", "", "Prints the module version, the source revision and the Go version this binary was built from.")
	fs.SetOutput(stderr)
	pos, err := parseArgs(fs, args, stdout, stderr)
	if err != nil {
		return err
	}
	if len(pos) != 0 {
		return usagef(fs, "takes no arguments")
	}
	fmt.Fprintln(stdout, versionLine())
	return nil
}

// versionLine describes the build: "reckon VERSION (revision REV[, modified],
// TIME) GOVERSION". A binary built from a checkout with "go build" carries
// the VCS revision; "go run" and tests carry none.
func versionLine() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "reckon (no build information)"
	}
	version := bi.Main.Version
	if version == "" {
		version = "(devel)"
	}
	var rev, when, modified string
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.time":
			when = s.Value
		case "vcs.modified":
			if s.Value == "true" {
				modified = ", modified"
			}
		}
	}
	line := fmt.Sprintf("reckon %s %s", bi.Main.Path, version)
	if rev != "" {
		line += fmt.Sprintf(" (revision %s%s, %s)", rev, modified, when)
	} else {
		line += " (no revision recorded)"
	}
	return line + " " + bi.GoVersion
}
