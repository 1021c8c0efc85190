package main

import (
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
)

// TestConfigWriteFailureLeavesNoFile: a new configuration that cannot be
// written whole (the disk full; here a file size limit of 100 bytes, which
// makes the write fail as a full disk does, part way) leaves no file at
// -out, and an existing one as it was: the cut file was left behind, an
// invalid configuration that also made the next run refuse "-out exists".
func TestConfigWriteFailureLeavesNoFile(t *testing.T) {
	dir := t.TempDir()
	out := filepath.Join(dir, "new.yaml")
	edits := []configEdit{{path: "noise.imu_heading_var_rad2", value: "4e-06", comment: "from a test"}}
	note := func(changes []string) string { return "a test: " + strings.Join(changes, ", ") }
	write := func() error {
		var old syscall.Rlimit
		if err := syscall.Getrlimit(syscall.RLIMIT_FSIZE, &old); err != nil {
			t.Fatal(err)
		}
		lim := old
		lim.Cur = 100
		if err := syscall.Setrlimit(syscall.RLIMIT_FSIZE, &lim); err != nil {
			t.Skipf("cannot limit the file size: %v", err)
		}
		defer syscall.Setrlimit(syscall.RLIMIT_FSIZE, &old)
		_, err := writeConfigEdits(exampleConfig, out, edits, note)
		return err
	}
	if err := write(); err == nil {
		t.Fatal("the write past the file size limit succeeded")
	}
	if _, err := os.Stat(out); err == nil {
		t.Errorf("a failed write left %s behind", out)
	}
	orig := []byte("# an earlier configuration\n")
	if err := os.WriteFile(out, orig, 0o644); err != nil {
		t.Fatal(err)
	}
	if err := write(); err == nil {
		t.Fatal("the write past the file size limit succeeded")
	}
	if b, _ := os.ReadFile(out); string(b) != string(orig) {
		t.Errorf("a failed write changed the existing %s to %q", out, b)
	}
	if names, _ := os.ReadDir(dir); len(names) != 1 {
		t.Errorf("a failed write left files behind: %v", names)
	}
	// Unlimited, the same write makes a configuration that loads.
	if _, err := writeConfigEdits(exampleConfig, out, edits, note); err != nil {
		t.Fatal(err)
	}
	if _, err := loadYAML(out); err != nil {
		t.Error(err)
	}
	if st, err := os.Stat(out); err != nil || st.Mode().Perm() != 0o644 {
		t.Errorf("the new configuration: %v, mode %v; want 0644", err, st.Mode())
	}
}
