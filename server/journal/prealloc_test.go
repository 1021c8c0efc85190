package journal_test

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"reckon.example/server/journal"
)

// plainFS hides Preallocated from its files, so that the journal appends
// with write(2) as before it allocated ahead.
type plainFS struct{ journal.FS }

type plainFile struct{ journal.File }

func (p plainFS) OpenFile(name string, flag int, perm os.FileMode) (journal.File, error) {
	f, err := p.FS.OpenFile(name, flag, perm)
	if err != nil {
		return nil, err
	}
	return plainFile{f}, nil
}

// cartPairs writes pairs from to to, each flushed alone, as the service
// does at a robot's rates.
func cartPairs(t *testing.T, w *journal.Writer, from, to uint64) {
	t.Helper()
	for seq := from; seq <= to; seq++ {
		if err := w.AddPair(input(seq), output(seq)); err != nil {
			t.Fatal(err)
		}
		if c, err := w.Flush(); c != 1 || err != nil {
			t.Fatalf("flush %d: %d complete, %v", seq, c, err)
		}
	}
}

// copyDir copies the files of src into a new directory: what a crash of
// the process leaves is what the page cache holds, and reading the files
// while the writer is open sees exactly that.
func copyDir(t *testing.T, src string) string {
	t.Helper()
	dst := t.TempDir()
	es, err := os.ReadDir(src)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range es {
		b, err := os.ReadFile(filepath.Join(src, e.Name()))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dst, e.Name()), b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	return dst
}

// TestPreallocatedSegments: on the operating system's file system the
// segments are appended to by stores into space allocated ahead. After
// Close they hold the same bytes as segments written with write(2); while
// the writer is open (as a crash of the process leaves them) the last
// ends in the zeros allocated ahead, which the scanner reads as nothing
// written: every flushed pair is read, no damage, nothing torn, and the
// journal resumes there; a store cut short before the zeros is a torn
// tail, not kept aside.
func TestPreallocatedSegments(t *testing.T) {
	const n, segBytes = 300, 4 << 10
	mapped, plain := t.TempDir(), t.TempDir()
	if _, ok := mustOpen(t, mapped).(journal.Preallocated); !ok {
		t.Skip("the operating system's files are not Preallocated here")
	}
	w, err := journal.Create(mapped, "cart", opening, journal.Options{SegmentBytes: segBytes})
	if err != nil {
		t.Fatal(err)
	}
	cartPairs(t, w, 1, n)

	crashed := copyDir(t, mapped)
	segs, _ := journal.Segments(crashed, "cart")
	if len(segs) < 3 {
		t.Fatalf("%d segments, want rotations", len(segs))
	}
	for i, s := range segs {
		fi, _ := os.Stat(s)
		if last := i == len(segs)-1; last != (fi.Size()%(1<<20) == 0) {
			t.Errorf("segment %s: %d bytes; only the last, being written, has space allocated ahead", s, fi.Size())
		}
	}
	sc, err := journal.Read(crashed, "cart", journal.Visitor{})
	if err != nil || sc.Pairs != n || len(sc.Damage) > 0 || sc.Torn != nil {
		t.Fatalf("the open journal reads as %d pairs, damage %v, torn %v, err %v; want %d pairs, no damage, nothing torn", sc.Pairs, sc.Damage, sc.Torn, err, n)
	}
	// A crash in the middle of a store leaves the start of a frame before
	// the zeros: cut short, never acknowledged, not damage.
	last := segs[len(segs)-1]
	b, _ := os.ReadFile(last)
	copy(b[sc.Good:], b[16:16+20]) // the first frame's first 20 bytes
	os.WriteFile(last, b, 0o644)
	if sc2, err := journal.Read(crashed, "cart", journal.Visitor{}); err != nil || sc2.Pairs != n || len(sc2.Damage) > 0 || sc2.TornKept != "" || sc2.Torn == nil || sc2.Good != sc.Good {
		t.Fatalf("a store cut short reads as %d pairs, damage %v, torn %v kept %q, err %v; want %d pairs, a torn tail, nothing kept", sc2.Pairs, sc2.Damage, sc2.Torn, sc2.TornKept, err, n)
	}
	r, err := journal.Resume(crashed, "cart", sc.Segment, sc.Good, journal.Options{SegmentBytes: segBytes})
	if err != nil {
		t.Fatal(err)
	}
	cartPairs(t, r, n+1, n+10)
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	if sc, err := journal.Read(crashed, "cart", journal.Visitor{}); err != nil || sc.Pairs != n+10 || sc.Torn != nil {
		t.Fatalf("after resuming: %d pairs, torn %v, err %v; want %d", sc.Pairs, sc.Torn, err, n+10)
	}

	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	p, err := journal.Create(plain, "cart", opening, journal.Options{SegmentBytes: segBytes, FS: plainFS{journal.OS}})
	if err != nil {
		t.Fatal(err)
	}
	cartPairs(t, p, 1, n)
	if err := p.Close(); err != nil {
		t.Fatal(err)
	}
	ms, _ := journal.Segments(mapped, "cart")
	ps, _ := journal.Segments(plain, "cart")
	if len(ms) != len(ps) {
		t.Fatalf("%d segments stored, %d written", len(ms), len(ps))
	}
	for i := range ms {
		a, _ := os.ReadFile(ms[i])
		b, _ := os.ReadFile(ps[i])
		if !bytes.Equal(a, b) {
			t.Errorf("segment %d: %d bytes stored differ from the %d written", i, len(a), len(b))
		}
	}
	names, _ := os.ReadDir(mapped)
	for _, e := range names {
		if strings.Contains(e.Name(), "damaged") {
			t.Errorf("%s kept aside", e.Name())
		}
	}
}

// mustOpen opens a new file in dir through the operating system's FS.
func mustOpen(t *testing.T, dir string) journal.File {
	t.Helper()
	f, err := journal.OS.OpenFile(filepath.Join(dir, "probe"), os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { f.Close(); os.Remove(filepath.Join(dir, "probe")) })
	return f
}
