package server

import (
	"bytes"
	"context"
	"log/slog"
	"strings"
	"syscall"
	"testing"

	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// TestFailingRotationLoggedOnce: a journal rotation that keeps failing (no
// file descriptor left: EMFILE, as with many clients and a low ulimit -n)
// is tried again at every write and logged once, and once more when it
// works; every verdict meanwhile keeps its sequence number. Before, each
// batch logged a warning: reckond under ulimit -n 30 with 60 idle
// connections wrote 6586 lines in 5 s.
func TestFailingRotationLoggedOnce(t *testing.T) {
	mem := faultfs.NewMem()
	ffs := faultfs.New(mem, nil)
	var logs bytes.Buffer
	srv := start(t, testConfig{Options: Options{JournalDir: "/j", FS: ffs, SegmentBytes: 4096,
		Logger: slog.New(slog.NewTextHandler(&logs, nil))}})
	api := dial(t, srv.addr)
	samp := createCart(t, api, 3)
	f, err := openFeed(context.Background(), api, "robots/cart")
	if err != nil {
		t.Fatal(err)
	}
	apply := func(from, to int) {
		t.Helper()
		for i, s := range samp[from:to] {
			if resp, err := f.apply(s); err != nil || resp.GetSequence() == 0 {
				t.Fatalf("sample %d: %v %v", from+i, resp, err)
			}
		}
	}
	ffs.SetInject(faultfs.From(faultfs.OpCreate, "cart.000001.rjl", 0, syscall.EMFILE))
	apply(0, 200)
	failed := ffs.Count(faultfs.OpCreate)
	ffs.SetInject(nil)
	apply(200, 210)
	if err := f.close(); err != nil {
		t.Fatal(err)
	}
	srv.stop()
	if failed < 50 {
		t.Fatalf("%d creates while failing: the rotation was not tried at each write (the test needs more samples)", failed)
	}
	out := logs.String()
	if n := strings.Count(out, "too many open files"); n != 1 {
		t.Errorf("the failing rotation logged %d times, want once:\n%s", n, out[:min(len(out), 2000)])
	}
	if n := strings.Count(out, "the journal writes again"); n != 1 {
		t.Errorf("the recovery logged %d times, want once", n)
	}
	if segs, err := journal.SegmentsFS(mem, "/j", "cart"); err != nil || len(segs) < 2 {
		t.Errorf("segments %v %v, want the rotation done once it could be", segs, err)
	}
}
