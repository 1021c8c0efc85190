package journal

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
)

// The manifest, {dir}/{robot}.manifest, names a robot's newest segment, so
// that a deleted last segment is noticed: nothing in the segments before it
// says that it existed. Since version 2 it also records each sealed segment
// (one that the writer rotated away from and never writes again): its size,
// the sequence number of the last input in it and where its last snapshot
// starts, so that a restart reads only from the last snapshot on and checks
// the older segments by their sizes (ReadFS), and Verify can compare them
// later. It is rewritten atomically (writeFileAtomic) after each new
// segment is durable, so it may lag the segments by one after a crash,
// never lead them. Journals of builds before it have none; Resume writes
// one. Version 1 (newest segment only) is read, and Resume writes version 2
// in its place with the sealed segments the scan read.
const (
	manifestExt     = ".manifest"
	manifestHeadV1  = "reckon journal manifest 1\n"
	manifestHeadV2  = "reckon journal manifest 2\n"
	manifestNewest  = "newest-segment "
	manifestSealed  = "sealed "
	manifestNoSnaps = "none"
)

// ManifestPath returns the path of a robot's manifest.
func ManifestPath(dir, robot string) string {
	return filepath.Join(dir, robot+manifestExt)
}

// manifest is what a robot's manifest holds.
type manifest struct {
	newest int
	// sealed lists the sealed segments recorded, in order of their numbers
	// (from 0 without a hole in a manifest this build wrote; an older
	// journal's manifest has none until Resume completes it).
	sealed []sealedSegment
}

// sealedSegment is what the manifest records of a sealed segment, or what
// a scan found of a segment it read whole.
type sealedSegment struct {
	n    int
	size int64 // bytes
	// last is the sequence number of the last complete input in the
	// journal at the segment's end (0: none yet).
	last uint64
	// snapAt is the offset of the segment's last snapshot record (-1:
	// none), snapSeq its sequence number.
	snapAt  int64
	snapSeq uint64
}

func (s sealedSegment) line() string {
	snap := manifestNoSnaps
	if s.snapAt >= 0 {
		snap = fmt.Sprintf("%d at %d", s.snapSeq, s.snapAt)
	}
	return fmt.Sprintf("%s%06d bytes %d last %d snapshot %s\n", manifestSealed, s.n, s.size, s.last, snap)
}

// parseSealed reads a line written by sealedSegment.line (without its
// newline).
func parseSealed(line string) (sealedSegment, bool) {
	s := sealedSegment{snapAt: -1}
	f := strings.Fields(line)
	if len(f) != 8 && len(f) != 10 || f[0] != strings.TrimSpace(manifestSealed) || f[2] != "bytes" || f[4] != "last" || f[6] != "snapshot" {
		return s, false
	}
	var err [5]error
	s.n, err[0] = strconv.Atoi(f[1])
	s.size, err[1] = strconv.ParseInt(f[3], 10, 64)
	s.last, err[2] = strconv.ParseUint(f[5], 10, 64)
	switch {
	case len(f) == 8 && f[7] == manifestNoSnaps:
	case len(f) == 10 && f[8] == "at":
		s.snapSeq, err[3] = strconv.ParseUint(f[7], 10, 64)
		s.snapAt, err[4] = strconv.ParseInt(f[9], 10, 64)
	default:
		return s, false
	}
	return s, errors.Join(err[:]...) == nil && s.n >= 0 && s.size >= headerSize && s.snapAt >= -1 && s.snapAt < s.size
}

// readManifest returns what the manifest holds; ok is false when there is
// no manifest.
func readManifest(fsys FS, dir, robot string) (m manifest, ok bool, err error) {
	path := ManifestPath(dir, robot)
	b, err := readFile(fsys, path)
	if errors.Is(err, os.ErrNotExist) {
		return m, false, nil
	}
	if err != nil {
		return m, false, err
	}
	if m, ok = parseManifest(string(b)); !ok {
		head, more := b[:min(len(b), 64)], ""
		if len(head) < len(b) {
			more = fmt.Sprintf(" and %d bytes more", len(b)-len(head))
		}
		return m, false, fmt.Errorf("%s: not a journal manifest (%q%s); if the robot's segments are whole, move it aside and restart: it is written again from them", path, head, more)
	}
	return m, true, nil
}

// parseManifest reads a manifest of version 1 or 2.
func parseManifest(s string) (m manifest, ok bool) {
	v2 := strings.HasPrefix(s, manifestHeadV2)
	if !v2 && !strings.HasPrefix(s, manifestHeadV1) {
		return m, false
	}
	lines := strings.Split(strings.TrimSuffix(s[len(manifestHeadV1):], "\n"), "\n")
	n, found := strings.CutPrefix(lines[0], manifestNewest)
	var err error
	if m.newest, err = strconv.Atoi(n); !found || err != nil || m.newest < 0 || !v2 && len(lines) > 1 {
		return m, false
	}
	for _, l := range lines[1:] {
		sg, ok := parseSealed(l)
		if !ok || sg.n >= m.newest || len(m.sealed) > 0 && sg.n <= m.sealed[len(m.sealed)-1].n {
			return m, false
		}
		m.sealed = append(m.sealed, sg)
	}
	return m, true
}

// writeManifest writes m as the robot's manifest.
func writeManifest(fsys FS, dir, robot string, m manifest) error {
	var b strings.Builder
	b.WriteString(manifestHeadV2 + manifestNewest + strconv.Itoa(m.newest) + "\n")
	for _, s := range m.sealed {
		b.WriteString(s.line())
	}
	return writeFileAtomic(fsys, ManifestPath(dir, robot), []byte(b.String()))
}

// recorded returns the manifest's record of segment n.
func (m manifest) recorded(n int) (sealedSegment, bool) {
	for _, s := range m.sealed {
		if s.n == n {
			return s, true
		}
	}
	return sealedSegment{}, false
}

// complete adds the records of the segments in found before segment seg
// that m does not record, keeping the order; a segment it records keeps
// its record (what it was when sealed), whatever the scan found.
func (m *manifest) complete(found []sealedSegment, seg int) {
	for _, f := range found {
		if _, ok := m.recorded(f.n); !ok && f.n < seg {
			m.sealed = append(m.sealed, f)
		}
	}
	slices.SortFunc(m.sealed, func(a, b sealedSegment) int { return a.n - b.n })
}
