package daemon

import (
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"
)

// TestReadFlagFile: a regular file and a named pipe whose writer writes
// and closes it are read (a shell's <(...) hands a secret over so); a
// named pipe no process writes to, a directory, a device and a file past
// MaxFlagFileBytes are refused naming what they are.
func TestReadFlagFile(t *testing.T) {
	dir := t.TempDir()
	plain := filepath.Join(dir, "token")
	os.WriteFile(plain, []byte("greenhouse-7\n"), 0o600)
	if b, err := ReadFlagFile(plain); err != nil || string(b) != "greenhouse-7\n" {
		t.Errorf("regular file: %q %v", b, err)
	}
	fifo := filepath.Join(dir, "fifo")
	if err := syscall.Mkfifo(fifo, 0o600); err != nil {
		t.Skipf("mkfifo: %v", err)
	}
	if _, err := ReadFlagFile(fifo); err == nil || !strings.Contains(err.Error(), "named pipe that no process writes to") {
		t.Errorf("a pipe without a writer: %v", err)
	}
	// A shell's <(...) has its writer there before the command starts:
	// a reader held open lets the writer's open go on, and keeps what it
	// writes in the pipe after it closed.
	hold, err := os.OpenFile(fifo, os.O_RDONLY|syscall.O_NONBLOCK, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer hold.Close()
	w, err := os.OpenFile(fifo, os.O_WRONLY, 0)
	if err != nil {
		t.Fatal(err)
	}
	w.Write([]byte("from-a-pipe"))
	w.Close()
	b, err := ReadFlagFile(fifo)
	if err != nil {
		t.Fatal(err)
	}
	if string(b) != "from-a-pipe" {
		t.Errorf("a pipe with a writer: %q", b)
	}
	big := filepath.Join(dir, "big")
	os.WriteFile(big, make([]byte, MaxFlagFileBytes+1), 0o600)
	for path, want := range map[string]string{dir: "is a directory", "/dev/null": "is a character device", big: "more than 1048576 bytes"} {
		if _, err := ReadFlagFile(path); err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("%s: %v, want %q", path, err, want)
		}
	}
}
