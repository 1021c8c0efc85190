package server

import (
	"runtime"
	"runtime/debug"
	"strings"
	"sync"
)

// buildStamp, if set at link time (-ldflags "-X
// reckon.example/server.buildStamp=v1.4.0-3f2a9c1"), names this build;
// otherwise ThisBuild reads the module version and VCS revision.
var buildStamp string

var thisBuild = sync.OnceValue(func() string {
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "unknown " + runtime.GOARCH
	}
	if buildStamp != "" {
		return buildStamp + " " + archOf(bi.Settings)
	}
	b := bi.Main.Version
	var rev, modified string
	for _, s := range bi.Settings {
		switch s.Key {
		case "vcs.revision":
			rev = s.Value
		case "vcs.modified":
			if s.Value == "true" {
				modified = "+modified"
			}
		}
	}
	if rev != "" {
		b += " " + rev + modified
	}
	return b + " " + archOf(bi.Settings)
})

// archOf names the architecture a build's floating point depends on: its
// GOARCH and, where set, the instruction-set level that lets the compiler
// fuse a multiply and an add (GOAMD64 v3 and up; arm64 always may). The
// same source computes other bits on another one, so a journal restored
// there is another build's (its outputs are replayed and their
// differences noted, not taken for damage).
func archOf(settings []debug.BuildSetting) string {
	arch := runtime.GOARCH
	for _, s := range settings {
		if s.Key == "GO"+strings.ToUpper(runtime.GOARCH) && s.Value != "" {
			arch += "/" + s.Value
		}
	}
	return arch
}

// ThisBuild names the running build as journals record it
// (JournalOpening.build, JournalSnapshot.build): the module version, the
// VCS revision and "+modified" for a modified tree, or the link-time
// stamp; then the architecture (archOf), such as "amd64" or "arm64".
func ThisBuild() string { return thisBuild() }
