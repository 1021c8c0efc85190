package server

import (
	"runtime/debug"
	"sync"
)

// buildStamp, if set at link time (-ldflags "-X
// reckon.example/server.buildStamp=v1.4.0-3f2a9c1"), names this build;
// otherwise ThisBuild reads the module version and VCS revision.
var buildStamp string

var thisBuild = sync.OnceValue(func() string {
	if buildStamp != "" {
		return buildStamp
	}
	bi, ok := debug.ReadBuildInfo()
	if !ok {
		return "unknown"
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
	return b
})

// ThisBuild names the running build as journals record it
// (JournalOpening.build, JournalSnapshot.build): the module version, the
// VCS revision and "+modified" for a modified tree, or the link-time
// stamp.
func ThisBuild() string { return thisBuild() }
