package main

import (
	"errors"
	"io/fs"
	"os"
	"path/filepath"

	"reckon.example/clients/review"
)

// newDirs notes which of the directory path and its parents do not exist
// yet, for a command that creates path for its output. Its result removes
// them, deepest first, each only if it is empty: a command that fails
// leaves no empty directory of its own behind, and never removes a
// directory that was there before it or that holds anything.
func newDirs(path string) (remove func()) {
	var made []string
	for p := filepath.Clean(path); ; p = filepath.Dir(p) {
		if _, err := os.Lstat(p); !errors.Is(err, fs.ErrNotExist) {
			break
		}
		made = append(made, p)
		if filepath.Dir(p) == p {
			break
		}
	}
	return func() {
		for _, d := range made {
			if os.Remove(d) != nil {
				return
			}
		}
	}
}

// staging is a directory inside a command's output directory where the
// command writes its files; commit moves them into the output directory
// once all are written, each by a rename that replaces the file of that
// name. A command that fails before leaves the files of an earlier one
// there as they were, not a mix of old and new (replay, export and the
// configuration writers do the same for their single files).
type staging struct {
	dir, tmp string
	made     func()
}

// stage makes dir if it does not exist and the staging directory in it,
// named ".reckon-*.tmp" (inside dir, so that it needs no more than dir
// does and its renames stay on one file system).
func stage(dir string) (*staging, error) {
	made := newDirs(dir)
	if err := os.MkdirAll(dir, 0o755); err != nil {
		made()
		return nil, err
	}
	tmp, err := os.MkdirTemp(dir, ".reckon-*.tmp")
	if err != nil {
		made()
		return nil, err
	}
	return &staging{dir: dir, tmp: tmp, made: made}, nil
}

// abandon removes the staging directory, and the directories stage noted
// as new if they are empty.
func (s *staging) abandon() {
	os.RemoveAll(s.tmp)
	s.made()
}

// place points the exports of runs, written in the staging directory, at
// where commit puts them, for the summary and the report to name.
func (s *staging) place(runs ...*review.Run) {
	for _, r := range runs {
		for _, p := range []*string{&r.FilteredCSV, &r.SmoothedCSV, &r.FixesCSV, &r.MarkersCSV} {
			if *p != "" {
				*p = filepath.Join(s.dir, filepath.Base(*p))
			}
		}
	}
}

// commit moves every file of the staging directory into dir and removes
// the staging directory; on an error it abandons what is left.
func (s *staging) commit() error {
	entries, err := os.ReadDir(s.tmp)
	if err != nil {
		s.abandon()
		return err
	}
	for _, e := range entries {
		if err := os.Rename(filepath.Join(s.tmp, e.Name()), filepath.Join(s.dir, e.Name())); err != nil {
			s.abandon()
			return err
		}
	}
	return os.Remove(s.tmp)
}
