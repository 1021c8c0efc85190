package journal

import (
	"errors"
	"runtime"
	"syscall"
	"testing"

	"golang.org/x/sys/unix"

	pb "reckon.example/proto/reckon/v1"
)

// threadFaults returns the minor page faults the calling thread took.
func threadFaults(t *testing.T) int64 {
	var ru unix.Rusage
	if err := unix.Getrusage(unix.RUSAGE_THREAD, &ru); err != nil {
		t.Fatal(err)
	}
	return ru.Minflt
}

// flushFaults writes 64 KiB of pairs and fsyncs them, which writes their
// pages back and makes them read-only again (the kernel tracks the next
// store into each), readies the pages ahead when prefault says so, and
// returns the page faults of the flush of the next 16 KiB or so: the copy
// into the partly filled page and four or five new ones.
func flushFaults(t *testing.T, prefault bool) int64 {
	w, err := Create(t.TempDir(), "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer w.Close()
	seq := uint64(0)
	add := func(bytes int64) {
		for start := w.size + int64(len(w.buf)); w.size+int64(len(w.buf)) < start+bytes; {
			seq++
			if err := w.Add(pair(seq)...); err != nil {
				t.Fatal(err)
			}
		}
	}
	add(64 << 10)
	if _, err := w.Flush(); err != nil {
		t.Fatal(err)
	}
	if err := w.Sync(); err != nil {
		t.Fatal(err)
	}
	if prefault {
		if err := w.Prefault(); errors.Is(err, syscall.EINVAL) {
			t.Skipf("this kernel cannot ready pages (MADV_POPULATE_WRITE, Linux 5.14): %v", err)
		} else if err != nil {
			t.Fatal(err)
		}
	}
	add(16 << 10)
	runtime.LockOSThread()
	defer runtime.UnlockOSThread()
	before := threadFaults(t)
	if c, err := w.Flush(); err != nil || c == 0 {
		t.Fatalf("flush: %d, %v", c, err)
	}
	return threadFaults(t) - before
}

// TestPrefaultSparesTheCopiesFaults: after a sync, a flush into the pages
// Prefault readied takes no page fault, where the same flush without it
// takes one for each page it dirties. That a store into a shared file
// mapping faults on a page not yet present, or written back since (the
// kernel tracks dirty pages so), is common practice; that
// MADV_POPULATE_WRITE faults the range in writable "as if manually writing
// to each page" is madvise(2)'s wording, from memory. Counted with
// getrusage(RUSAGE_THREAD) around the flush on a locked thread.
//
// Each side is the fewest of three tries, so that a fault of the runtime's
// own on the thread (a garbage collector's assist) does not count.
func TestPrefaultSparesTheCopiesFaults(t *testing.T) {
	without, with := int64(1<<62), int64(1<<62)
	for range 3 {
		without = min(without, flushFaults(t, false))
		with = min(with, flushFaults(t, true))
	}
	t.Logf("page faults of a 16 KiB flush after a sync: %d without Prefault, %d with", without, with)
	if without < 4 {
		t.Fatalf("without Prefault the flush took %d page faults, want one a page (at least 4): the test cannot tell", without)
	}
	if with != 0 {
		t.Errorf("with Prefault the flush took %d page faults, want 0", with)
	}
}
