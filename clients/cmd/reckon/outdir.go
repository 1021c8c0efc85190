package main

import (
	"errors"
	"io/fs"
	"os"
	"path/filepath"
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
