package faultfs

import (
	"errors"
	"io"
	"os"
	"syscall"
	"testing"

	"reckon.example/server/journal"
)

func content(t *testing.T, m *MemFS, name string) (string, bool) {
	t.Helper()
	f, err := m.OpenFile(name, os.O_RDONLY, 0)
	if errors.Is(err, os.ErrNotExist) {
		return "", false
	}
	if err != nil {
		t.Fatal(err)
	}
	b, _ := io.ReadAll(f)
	return string(b), true
}

// TestCrashKeepsOnlyWhatWasSynced: the model of LevelDB's fault-injection
// test: a file's contents survive a crash as of its last fsync, its name
// as of its directory's last fsync.
func TestCrashKeepsOnlyWhatWasSynced(t *testing.T) {
	m := NewMem()
	m.MkdirAll("/d", 0o755)
	f, _ := m.OpenFile("/d/a", os.O_WRONLY|os.O_CREATE, 0o644)
	f.Write([]byte("one"))
	f.Sync()
	if _, ok := content(t, m.Crash(), "/d/a"); ok {
		t.Error("a file whose directory was not synced survived")
	}
	m.SyncDir("/d")
	f.Write([]byte("two"))
	if got, _ := content(t, m.Crash(), "/d/a"); got != "one" {
		t.Errorf("after crash %q, want the synced %q", got, "one")
	}
	m.Rename("/d/a", "/d/b")
	c := m.Crash()
	if _, ok := content(t, c, "/d/b"); ok {
		t.Error("a rename without a directory sync survived")
	}
	if got, _ := content(t, c, "/d/a"); got != "one" {
		t.Errorf("old name holds %q", got)
	}
	m.SyncDir("/d")
	f.Sync()
	f.Truncate(2)
	if got, _ := content(t, m.Crash(), "/d/b"); got != "onetwo" {
		t.Errorf("unsynced truncation kept: %q", got)
	}
	if got, _ := content(t, m, "/d/b"); got != "on" {
		t.Errorf("live contents %q", got)
	}
}

// TestInjectNth: Nth fails one operation, From every one from then on;
// a failed write with ShortWrite writes half its bytes.
func TestInjectNth(t *testing.T) {
	m := NewMem()
	m.MkdirAll("/d", 0o755)
	fs := New(m, Nth(OpWrite, "/d/a", 1, syscall.ENOSPC))
	fs.ShortWrite = true
	f, _ := fs.OpenFile("/d/a", os.O_WRONLY|os.O_CREATE, 0o644)
	if _, err := f.Write([]byte("1234")); err != nil {
		t.Fatal(err)
	}
	if n, err := f.Write([]byte("5678")); n != 2 || !errors.Is(err, syscall.ENOSPC) {
		t.Fatalf("second write: %d, %v", n, err)
	}
	if _, err := f.Write([]byte("9")); err != nil {
		t.Fatal(err)
	}
	if got, _ := content(t, m, "/d/a"); got != "1234569" {
		t.Errorf("contents %q", got)
	}
	fs.Inject = From(OpSync, "", 0, syscall.EIO)
	for i := 0; i < 3; i++ {
		if err := f.Sync(); !errors.Is(err, syscall.EIO) {
			t.Errorf("sync %d: %v", i, err)
		}
	}
	if fs.Count(OpWrite) != 3 || fs.Count(OpSync) != 3 {
		t.Errorf("counts %d writes, %d syncs", fs.Count(OpWrite), fs.Count(OpSync))
	}
	var _ journal.FS = fs
}
