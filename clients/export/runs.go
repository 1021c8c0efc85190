package export

import (
	"path/filepath"
	"sort"
	"strconv"
	"strings"

	"reckon.example/server/journal"
)

// Run is one journal of a robot in a journal directory.
type Run struct {
	// Robot is the robot id.
	Robot string
	// ID is "live" for the robot's journal, "deleted-{unix ns}" for one set
	// aside by a delete.
	ID string
	// DeleteTimeUnixNs is when a set-aside journal was deleted, Unix
	// nanoseconds (0 for the live one).
	DeleteTimeUnixNs int64
	// suffix is what the delete appended to the file names.
	suffix string
}

// liveRun is the Run.ID of a robot's journal.
const liveRun = "live"

// Runs lists the journals in dir: for each robot, in order of id, the ones
// set aside by deletes (oldest first) when deleted is true, then the live
// one if there is one. A journal set aside is recognised by the suffix
// ".deleted-{unix ns}" of its manifest and segments; when a delete had to
// add a further ".1" to a name that was taken (journal.SetAside), that file
// is read as part of a run of its own, which then reports a gap.
func Runs(dir string, deleted bool) ([]Run, error) {
	live, err := journal.Robots(dir)
	if err != nil {
		return nil, err
	}
	byRobot := map[string][]Run{}
	var robots []string
	if deleted {
		names, err := journal.OS.List(dir)
		if err != nil {
			return nil, err
		}
		seen := map[Run]bool{}
		for _, name := range names {
			r, ok := asideRun(name)
			if !ok || seen[r] {
				continue
			}
			seen[r] = true
			if byRobot[r.Robot] == nil {
				robots = append(robots, r.Robot)
			}
			byRobot[r.Robot] = append(byRobot[r.Robot], r)
		}
	}
	for _, id := range live {
		if byRobot[id] == nil {
			robots = append(robots, id)
		}
		byRobot[id] = append(byRobot[id], Run{Robot: id, ID: liveRun})
	}
	sort.Strings(robots)
	var out []Run
	for _, id := range robots {
		rs := byRobot[id]
		sort.SliceStable(rs, func(i, j int) bool {
			a, b := rs[i], rs[j]
			if (a.ID == liveRun) != (b.ID == liveRun) {
				return b.ID == liveRun
			}
			return a.DeleteTimeUnixNs < b.DeleteTimeUnixNs || a.DeleteTimeUnixNs == b.DeleteTimeUnixNs && a.suffix < b.suffix
		})
		out = append(out, rs...)
	}
	return out, nil
}

// asideRun returns the run a set-aside file name belongs to: a segment
// "{robot}.{n}.rjl.deleted-{ns}" or a manifest "{robot}.manifest.deleted-{ns}".
func asideRun(name string) (Run, bool) {
	i := strings.Index(name, journal.DeletedMark)
	if i < 0 {
		return Run{}, false
	}
	base, suffix := name[:i], name[i:]
	robot, _, _ := strings.Cut(base, ".")
	if !journal.ValidID(robot) || base != filepath.Base(journal.ManifestPath("", robot)) && !strings.HasSuffix(base, journal.Ext) {
		return Run{}, false
	}
	stamp, _, _ := strings.Cut(suffix[len(journal.DeletedMark):], ".")
	ns, err := strconv.ParseInt(stamp, 10, 64)
	if err != nil {
		return Run{}, false
	}
	return Run{Robot: robot, ID: suffix[1:], DeleteTimeUnixNs: ns, suffix: suffix}, true
}

// fs returns the file system a run's journal is read through: the OS for
// the live journal; for one set aside, a read-only view in which the
// run's files have their names without the suffix, and no other file is.
func (r Run) fs() journal.FS {
	if r.suffix == "" {
		return journal.OS
	}
	return journal.AsideFS(nil, r.suffix)
}
