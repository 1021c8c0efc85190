package server

import (
	"os"
	"strconv"
	"strings"
	"testing"
)

// TestSecondServerOnOneDirectory (issue 11, path 2): a second server on a
// journal directory in use refuses to start, naming the holder's pid; once
// the first closes, a server starts there.
func TestSecondServerOnOneDirectory(t *testing.T) {
	dir := t.TempDir()
	s1, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatal(err)
	}
	s2, err := New(Options{JournalDir: dir})
	if err == nil {
		s2.Close()
		s1.Close()
		t.Fatal("a second server started on the same journal directory")
	}
	if pid := strconv.Itoa(os.Getpid()); !strings.Contains(err.Error(), pid) {
		t.Errorf("error %q does not name pid %s", err, pid)
	}
	if err := s1.Close(); err != nil {
		t.Fatal(err)
	}
	s3, err := New(Options{JournalDir: dir})
	if err != nil {
		t.Fatalf("after the first closed: %v", err)
	}
	s3.Close()
}
