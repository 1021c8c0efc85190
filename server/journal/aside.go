package journal

import (
	"errors"
	"fmt"
	"os"
	"regexp"
	"sort"
	"strings"
)

// ErrReadOnly refuses every change through an AsideFS.
var ErrReadOnly = errors.New("journal: a set-aside journal is read only")

// AsideFS returns a read-only view of fsys (nil: OS) in which the files
// whose names end with suffix (DeletedMark and a time, as SetAside names
// them) have their names without it, and no other file is: the journal a
// deleted robot left, read as if it were live.
func AsideFS(fsys FS, suffix string) FS { return asideFS{fs: orOS(fsys), suffix: suffix} }

// Aside splits the name of a set-aside journal, "{robot}.deleted-{unix ns}"
// or "{robot}.deleted-{unix ns}.{n}" (SetAside), into the robot and the
// suffix of its files; ok is false for any other name.
func Aside(name string) (robot, suffix string, ok bool) {
	i := strings.Index(name, DeletedMark)
	if i <= 0 || !ValidID(name[:i]) || !asidePattern.MatchString(name[i+len(DeletedMark):]) {
		return "", "", false
	}
	return name[:i], name[i:], true
}

var asidePattern = regexp.MustCompile(`^[0-9]+(\.[0-9]+)?$`)

type asideFS struct {
	fs     FS
	suffix string
}

func (a asideFS) OpenFile(name string, flag int, perm os.FileMode) (File, error) {
	if flag != os.O_RDONLY {
		return nil, fmt.Errorf("%s: %w", name, ErrReadOnly)
	}
	return a.fs.OpenFile(name+a.suffix, flag, perm)
}

func (a asideFS) List(dir string) ([]string, error) {
	names, err := a.fs.List(dir)
	var out []string
	for _, n := range names {
		if s, ok := strings.CutSuffix(n, a.suffix); ok {
			out = append(out, s)
		}
	}
	sort.Strings(out)
	return out, err
}

func (a asideFS) Stat(name string) (os.FileInfo, error) { return a.fs.Stat(name + a.suffix) }

func (a asideFS) Rename(oldname, _ string) error { return fmt.Errorf("%s: %w", oldname, ErrReadOnly) }
func (a asideFS) Remove(name string) error       { return fmt.Errorf("%s: %w", name, ErrReadOnly) }
func (a asideFS) MkdirAll(dir string, _ os.FileMode) error {
	return fmt.Errorf("%s: %w", dir, ErrReadOnly)
}
func (a asideFS) SyncDir(dir string) error { return fmt.Errorf("%s: %w", dir, ErrReadOnly) }
func (a asideFS) Lock(name string) (File, error) {
	return nil, fmt.Errorf("%s: %w", name, ErrReadOnly)
}
