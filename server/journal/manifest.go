package journal

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strconv"
	"strings"
)

// The manifest, {dir}/{robot}.manifest, names a robot's newest segment, so
// that a deleted last segment is noticed: nothing in the segments before it
// says that it existed. It is rewritten atomically (writeFileAtomic) after
// each new segment is durable, so it may lag the segments by one after a
// crash, never lead them. Journals of builds before it have none; Resume
// writes one.
const (
	manifestExt    = ".manifest"
	manifestPrefix = "reckon journal manifest 1\nnewest-segment "
)

// ManifestPath returns the path of a robot's manifest.
func ManifestPath(dir, robot string) string {
	return filepath.Join(dir, robot+manifestExt)
}

// readManifest returns the newest segment the manifest names; ok is false
// when there is no manifest.
func readManifest(fsys FS, dir, robot string) (newest int, ok bool, err error) {
	path := ManifestPath(dir, robot)
	b, err := readFile(fsys, path)
	if errors.Is(err, os.ErrNotExist) {
		return 0, false, nil
	}
	if err != nil {
		return 0, false, err
	}
	s, found := strings.CutPrefix(string(b), manifestPrefix)
	if found {
		newest, err = strconv.Atoi(strings.TrimSuffix(s, "\n"))
	}
	if !found || err != nil || newest < 0 {
		head, more := b[:min(len(b), 64)], ""
		if len(head) < len(b) {
			more = fmt.Sprintf(" and %d bytes more", len(b)-len(head))
		}
		return 0, false, fmt.Errorf("%s: not a journal manifest (%q%s); if the robot's segments are whole, move it aside and restart: it is written again from them", path, head, more)
	}
	return newest, true, nil
}

// writeManifest names segment newest as the robot's newest.
func writeManifest(fsys FS, dir, robot string, newest int) error {
	return writeFileAtomic(fsys, ManifestPath(dir, robot), []byte(manifestPrefix+strconv.Itoa(newest)+"\n"))
}
