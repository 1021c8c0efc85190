package journal_test

import (
	"bytes"
	"encoding/binary"
	"errors"
	"io"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// failSegmentWrites fails the n-th write to a segment (not to a temporary
// file) with err, once.
func failSegment(op faultfs.Op, n int, err error) faultfs.Injector {
	seen := 0
	return func(o faultfs.Op, path string) error {
		if o != op || !strings.HasSuffix(path, journal.Ext) {
			return nil
		}
		seen++
		if seen-1 == n {
			return err
		}
		return nil
	}
}

// newJournal creates the cart's journal on a MemFS behind a fault
// injector.
func newJournal(t *testing.T, inject faultfs.Injector, opt journal.Options) (*journal.Writer, *faultfs.MemFS) {
	t.Helper()
	return newJournalOn(t, faultfs.NewMem(), inject, opt)
}

// newPlainJournal is newJournal on a file system that cannot reserve: the
// journal appends by write(2).
func newPlainJournal(t *testing.T, inject faultfs.Injector, opt journal.Options) (*journal.Writer, *faultfs.MemFS) {
	t.Helper()
	mem := faultfs.NewMem()
	mem.Plain = true
	return newJournalOn(t, mem, inject, opt)
}

func newJournalOn(t *testing.T, mem *faultfs.MemFS, inject faultfs.Injector, opt journal.Options) (*journal.Writer, *faultfs.MemFS) {
	t.Helper()
	mem.MkdirAll(dir, 0o755)
	ffs := faultfs.New(mem, inject)
	ffs.ShortWrite = true
	opt.FS = ffs
	w, err := journal.Create(dir, "cart", opening, opt)
	if err != nil {
		t.Fatal(err)
	}
	return w, mem
}

func addPairs(t *testing.T, w *journal.Writer, from, to uint64) {
	t.Helper()
	for seq := from; seq <= to; seq++ {
		if err := w.AddPair(input(seq), output(seq)); err != nil {
			t.Fatal(err)
		}
	}
}

// TestFlushPartialWrite: a write that stops half way through five entries
// (the disk full) counts the two written whole, takes the segment back to
// their end, and the writer goes on: the next Flush writes the other
// three.
func TestFlushPartialWrite(t *testing.T) {
	w, mem := newPlainJournal(t, failSegment(faultfs.OpWrite, 0, syscall.ENOSPC), journal.Options{})
	addPairs(t, w, 1, 5)
	complete, err := w.Flush()
	if complete != 2 || !errors.Is(err, journal.ErrNoSpace) {
		t.Fatalf("Flush = %d, %v; want 2 and ErrNoSpace", complete, err)
	}
	addPairs(t, w, 3, 5)
	if complete, err := w.Flush(); complete != 3 || err != nil {
		t.Fatalf("second Flush = %d, %v", complete, err)
	}
	w.Close()
	check(t, mem, 5, true)
}

// TestFlushPartialCopy: appending by a copy, a copy that fails part way
// through the headers of five entries (the frames' payloads are copied
// first, then their headers in order) counts the two entries whose frames
// have their headers, takes the segment back to their end, and the writer
// goes on; a reservation that finds the disk full counts none and says
// ErrNoSpace, and the next Flush writes them.
func TestFlushPartialCopy(t *testing.T) {
	// 10 frames: copies 0 to 9 are their payloads, 10 to 19 their headers;
	// copy 14 is the header of frame 4, the third entry's input.
	w, mem := newJournal(t, failSegment(faultfs.OpWrite, 14, syscall.EIO), journal.Options{})
	addPairs(t, w, 1, 5)
	if complete, err := w.Flush(); complete != 2 || !errors.Is(err, syscall.EIO) {
		t.Fatalf("Flush = %d, %v; want 2 and EIO", complete, err)
	}
	addPairs(t, w, 3, 5)
	if complete, err := w.Flush(); complete != 3 || err != nil {
		t.Fatalf("second Flush = %d, %v", complete, err)
	}
	w.Close()
	check(t, mem, 5, true)

	// A disk with no room left: the reservation, and then the one of the
	// write's own bytes, fail.
	mem = faultfs.NewMem()
	w, _ = newJournalOn(t, mem, nil, journal.Options{})
	mem.SetCapacity(mem.Used())
	addPairs(t, w, 1, 5)
	if complete, err := w.Flush(); complete != 0 || !errors.Is(err, journal.ErrNoSpace) {
		t.Fatalf("Flush with the disk full = %d, %v; want 0 and ErrNoSpace", complete, err)
	}
	mem.SetCapacity(0)
	addPairs(t, w, 1, 5)
	if complete, err := w.Flush(); complete != 5 || err != nil {
		t.Fatalf("second Flush = %d, %v", complete, err)
	}
	w.Close()
	check(t, mem, 5, true)
}

// TestNearlyFullDiskStillTakes: with less room on the disk than the
// reserve's chunk (a mebibyte), the writer reserves what each write needs
// and journals until the disk is really full; only then does a Flush say
// ErrNoSpace, and every entry it counted complete is in the journal.
func TestNearlyFullDiskStillTakes(t *testing.T) {
	mem := faultfs.NewMem()
	w, _ := newJournalOn(t, mem, nil, journal.Options{})
	room := int64(64 << 10)
	size := mem.Used() + room
	mem.SetCapacity(size)
	var taken uint64
	for seq := uint64(1); ; seq++ {
		addPairs(t, w, seq, seq)
		complete, err := w.Flush()
		if err != nil {
			if complete != 0 || !errors.Is(err, journal.ErrNoSpace) {
				t.Fatalf("Flush of input %d = %d, %v; want 0 and ErrNoSpace", seq, complete, err)
			}
			break
		}
		taken = seq
	}
	if left := size - mem.Used(); taken < 100 || left > 1024 {
		t.Errorf("took %d inputs, with %d bytes of %d still free", taken, left, room)
	}
	w.Close()
	check(t, mem, int(taken), true)
}

// TestFlushEIOIsNotNoSpace: an I/O error is not reported as a full disk.
func TestFlushEIOIsNotNoSpace(t *testing.T) {
	w, mem := newJournal(t, failSegment(faultfs.OpWrite, 0, syscall.EIO), journal.Options{})
	addPairs(t, w, 1, 1)
	if complete, err := w.Flush(); complete != 0 || err == nil || errors.Is(err, journal.ErrNoSpace) {
		t.Fatalf("Flush = %d, %v", complete, err)
	}
	w.Close()
	check(t, mem, 0, true)
}

// TestFlushRotateError: when the next segment cannot be started after a
// good write, Flush counts every entry complete and says so with a
// *RotateError; the writer keeps appending to the full segment and
// rotates at the next Flush.
func TestFlushRotateError(t *testing.T) {
	failed := false
	inject := func(op faultfs.Op, path string) error {
		if op == faultfs.OpRename && strings.Contains(path, ".000001.") && !failed {
			failed = true
			return syscall.ENOSPC
		}
		return nil
	}
	w, mem := newJournal(t, inject, journal.Options{SegmentBytes: 200})
	addPairs(t, w, 1, 4)
	complete, err := w.Flush()
	var re *journal.RotateError
	if complete != 4 || !errors.As(err, &re) || !errors.Is(err, journal.ErrNoSpace) {
		t.Fatalf("Flush = %d, %v; want 4 and a *RotateError", complete, err)
	}
	addPairs(t, w, 5, 6)
	if complete, err := w.Flush(); complete != 2 || err != nil {
		t.Fatalf("second Flush = %d, %v", complete, err)
	}
	if _, err := mem.Stat(journal.SegmentPath(dir, "cart", 1)); err != nil {
		t.Errorf("no rotation at the second Flush: %v", err)
	}
	w.Close()
	check(t, mem, 6, true)
}

// TestFlushSyncEachFailure: with SyncEach, entries whose fsync failed are
// not complete and are taken out of the segment; the writer goes on.
func TestFlushSyncEachFailure(t *testing.T) {
	w, mem := newJournal(t, failSegment(faultfs.OpSync, 0, syscall.EIO), journal.Options{SyncEach: true})
	addPairs(t, w, 1, 3)
	if complete, err := w.Flush(); complete != 0 || err == nil {
		t.Fatalf("Flush = %d, %v", complete, err)
	}
	addPairs(t, w, 1, 2)
	if complete, err := w.Flush(); complete != 2 || err != nil {
		t.Fatalf("second Flush = %d, %v", complete, err)
	}
	w.Close()
	check(t, mem, 2, true)
}

// TestSyncFailureBreaks: a failed periodic fsync breaks the writer: the
// kernel may have dropped the pages it could not write.
func TestSyncFailureBreaks(t *testing.T) {
	w, _ := newJournal(t, failSegment(faultfs.OpSync, 0, syscall.EIO), journal.Options{})
	addPairs(t, w, 1, 1)
	w.Flush()
	if err := w.Sync(); !errors.Is(err, journal.ErrBroken) {
		t.Fatalf("Sync = %v, want ErrBroken", err)
	}
	addPairs(t, w, 2, 2)
	if _, err := w.Flush(); !errors.Is(err, journal.ErrBroken) {
		t.Fatalf("Flush after a failed fsync = %v, want ErrBroken", err)
	}
}

// TestLock: a second holder of a journal directory's lock gets a
// *LockedError naming the first one's pid; after unlock the lock can be
// taken again. On the OS (flock) and on MemFS.
func TestLock(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	for name, c := range map[string]struct {
		fs  journal.FS
		dir string
	}{"os": {nil, t.TempDir()}, "mem": {mem, dir}} {
		t.Run(name, func(t *testing.T) {
			l, err := journal.Lock(c.fs, c.dir)
			if err != nil {
				t.Fatal(err)
			}
			_, err = journal.Lock(c.fs, c.dir)
			var le *journal.LockedError
			if !errors.As(err, &le) || le.PID != os.Getpid() || !strings.Contains(err.Error(), strconv.Itoa(os.Getpid())) {
				t.Fatalf("second lock: %v, want a *LockedError naming pid %d", err, os.Getpid())
			}
			if err := l.Unlock(); err != nil {
				t.Fatal(err)
			}
			l, err = journal.Lock(c.fs, c.dir)
			if err != nil {
				t.Fatalf("lock after unlock: %v", err)
			}
			l.Unlock()
		})
	}
}

// TestLockCheck: DirLock.Check passes while the locked directory is where
// it was, and says ErrDirGone once its lock file is not the one held: the
// directory removed, replaced by a file, or by another directory (where a
// second daemon could take a lock of its own).
func TestLockCheck(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	for name, c := range map[string]struct {
		fs     journal.FS
		dir    string
		change func(dir string) error
	}{
		"removed": {nil, "", os.RemoveAll},
		"replaced by a file": {nil, "", func(dir string) error {
			if err := os.RemoveAll(dir); err != nil {
				return err
			}
			return os.WriteFile(dir, []byte("x"), 0o644)
		}},
		"replaced by a directory": {nil, "", func(dir string) error {
			if err := os.Rename(dir, dir+".old"); err != nil {
				return err
			}
			if err := os.Mkdir(dir, 0o755); err != nil {
				return err
			}
			return os.WriteFile(filepath.Join(dir, journal.LockName), nil, 0o644)
		}},
		"mem, lock file removed": {mem, dir, func(dir string) error { return mem.Remove(filepath.Join(dir, journal.LockName)) }},
	} {
		t.Run(name, func(t *testing.T) {
			if c.dir == "" {
				c.dir = filepath.Join(t.TempDir(), "j")
				os.Mkdir(c.dir, 0o755)
			}
			l, err := journal.Lock(c.fs, c.dir)
			if err != nil {
				t.Fatal(err)
			}
			defer l.Unlock()
			if err := l.Check(); err != nil {
				t.Fatalf("check before: %v", err)
			}
			if err := c.change(c.dir); err != nil {
				t.Fatal(err)
			}
			if err := l.Check(); !errors.Is(err, journal.ErrDirGone) || !strings.Contains(err.Error(), c.dir) {
				t.Fatalf("check after: %v, want ErrDirGone naming %s", err, c.dir)
			}
		})
	}
}

// TestCreateFullDiskLeavesNothing: a robot created on a full disk fails
// with ErrNoSpace and leaves no file behind, and can be created once space
// returns.
func TestCreateFullDiskLeavesNothing(t *testing.T) {
	for _, op := range []faultfs.Op{faultfs.OpCreate, faultfs.OpWrite, faultfs.OpSync, faultfs.OpRename} {
		for n := 0; n < 2; n++ {
			mem := faultfs.NewMem()
			mem.MkdirAll(dir, 0o755)
			ffs := faultfs.New(mem, faultfs.Nth(op, "", n, syscall.ENOSPC))
			if _, err := journal.Create(dir, "cart", opening, journal.Options{FS: ffs}); !errors.Is(err, journal.ErrNoSpace) {
				t.Fatalf("%v %d: Create = %v, want ErrNoSpace", op, n, err)
			}
			if names, _ := mem.List(dir); len(names) > 0 {
				t.Errorf("%v %d: left %v", op, n, names)
			}
			w, err := journal.Create(dir, "cart", opening, journal.Options{FS: ffs})
			if err != nil {
				t.Fatalf("%v %d: Create once space returned: %v", op, n, err)
			}
			w.Close()
		}
	}
}

// TestGoldenFormatV1 reads testdata/v1, a journal written by the build
// before the manifest, damage handling and atomic creation (format
// version 1, the version this build writes): three segments, the last
// holding only its header, twelve pairs and a snapshot at the sixth. It has
// no rewrite flag on purpose: it must stay as the older build wrote it.
func TestGoldenFormatV1(t *testing.T) {
	tmp, names := copyGolden(t)
	sc, snap, seqs, err := readFromSnapshot(nil, tmp)
	if err != nil {
		t.Fatal(err)
	}
	if sc.Opening.GetRobot() != "robots/cart" || sc.Pairs != 12 || snap != 6 || len(seqs) != 6 || seqs[0] != 7 || sc.Segment != 2 || sc.Torn != nil || len(sc.Damage) > 0 {
		t.Fatalf("scan %+v, snapshot %d, pairs after it %v", sc, snap, seqs)
	}
	// Resuming the older journal writes its manifest; the records stay.
	w, err := journal.Resume(tmp, "cart", &sc, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	w.AddPair(input(13), output(13))
	w.Flush()
	w.Close()
	for _, n := range names {
		b, _ := os.ReadFile(n)
		got, _ := os.ReadFile(filepath.Join(tmp, filepath.Base(n)))
		if !bytes.HasPrefix(got, b) {
			t.Errorf("%s was rewritten", filepath.Base(n))
		}
	}
	if _, err := os.Stat(journal.ManifestPath(tmp, "cart")); err != nil {
		t.Error(err)
	}
	if sc, err := journal.Read(tmp, "cart", journal.Visitor{}); err != nil || sc.Pairs != 13 {
		t.Errorf("after resuming: %d pairs, %v", sc.Pairs, err)
	}
}

// writeCart writes n pairs into the cart's journal in dir on the OS, with
// 1 KiB segments, and returns the segment paths.
func writeCart(t *testing.T, d string, n int) []string {
	t.Helper()
	return writeSegmented(t, d, uint64(n), 1024, 0, nil)
}

// TestDamageKeptAndResynchronised damages a journal of 60 pairs in three
// segments (with bit flips, zeroed ranges, truncations and deletions, at
// several places) and reads it: every damaged range is reported and
// copied aside unchanged, every pair after it is read, a lost pair or
// segment is a gap, and no segment is changed by reading.
func TestDamageKeptAndResynchronised(t *testing.T) {
	type damage func(segs [][]byte) [][]byte
	flip := func(seg, off int) damage {
		return func(s [][]byte) [][]byte { s[seg][off] ^= 0x04; return s }
	}
	zero := func(seg, off, n int) damage {
		return func(s [][]byte) [][]byte { clear(s[seg][off : off+n]); return s }
	}
	cut := func(seg, n int) damage {
		return func(s [][]byte) [][]byte { s[seg] = s[seg][:len(s[seg])-n]; return s }
	}
	drop := func(seg int) damage {
		return func(s [][]byte) [][]byte { s[seg] = nil; return s }
	}
	// lost counts the pairs of the clean segments that a damaged range
	// touches; whole counts the pairs of a segment.
	lost := func(seg, from, to int) func([][]byte) int {
		return func(clean [][]byte) int { return pairsTouched(clean[seg], from, to) }
	}
	whole := func(seg int) func([][]byte) int {
		return func(clean [][]byte) int { return pairsTouched(clean[seg], 0, len(clean[seg])) }
	}
	none := func([][]byte) int { return 0 }
	cases := []struct {
		name   string
		damage damage
		lost   func(clean [][]byte) int // pairs lost
		gap    bool                     // a gap is reported
		ranges int                      // damaged ranges reported
		torn   bool
	}{
		{"no damage", func(s [][]byte) [][]byte { return s }, none, false, 0, false},
		{"bit flip in a record of segment 0", flip(0, 200), lost(0, 200, 201), true, 1, false},
		{"bit flips in segments 0 and 1", func(s [][]byte) [][]byte { return flip(1, 500)(flip(0, 300)(s)) },
			func(c [][]byte) int { return lost(0, 300, 301)(c) + lost(1, 500, 501)(c) }, true, 2, false},
		{"bit flip in a frame length", flip(1, 16+2), lost(1, 16, 17), true, 1, false},
		{"bit flip in the header of segment 1", flip(1, 3), none, false, 1, false},
		{"zeroed 100 bytes in segment 1", zero(1, 400, 100), lost(1, 400, 500), true, 1, false},
		{"zeroed header of segment 1", zero(1, 0, 16), none, false, 1, false},
		{"segment 1 truncated", cut(1, 30), func(c [][]byte) int { return lost(1, len(c[1])-30, len(c[1]))(c) }, true, 1, false},
		{"last segment's tail torn", cut(2, 5), func(c [][]byte) int { return lost(2, len(c[2])-5, len(c[2]))(c) }, false, 0, true},
		{"segment 1 deleted", drop(1), whole(1), true, 0, false},
		{"last segment deleted", drop(2), whole(2), true, 0, false},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			d := t.TempDir()
			paths := writeCart(t, d, 60)
			if len(paths) != 3 {
				t.Fatalf("%d segments", len(paths))
			}
			var segs, clean [][]byte
			for _, p := range paths {
				b, _ := os.ReadFile(p)
				segs = append(segs, b)
				clean = append(clean, bytes.Clone(b))
			}
			segs = c.damage(segs)
			pairs := 60 - c.lost(clean)
			for i, p := range paths {
				if segs[i] == nil {
					os.Remove(p)
				} else {
					os.WriteFile(p, segs[i], 0o644)
				}
			}
			// Read only first: the same damage, nothing kept aside, and
			// the report says the bytes are where they were.
			ro, _ := journal.Read(d, "cart", journal.Visitor{ReadOnly: true, Gap: func(error) error { return nil }})
			if len(ro.Damage) != c.ranges {
				t.Errorf("read only: damage %v", ro.Damage)
			}
			for _, dm := range ro.Damage {
				if dm.Kept != "" || !strings.Contains(dm.Error(), "left in place") {
					t.Errorf("read only: %v, kept in %q", dm, dm.Kept)
				}
			}
			if names, _ := filepath.Glob(filepath.Join(d, "*.damaged*")); len(names) > 0 {
				t.Errorf("read only: kept %v", names)
			}
			var handed int
			sc, err := journal.Read(d, "cart", journal.Visitor{
				Pair: func(*pb.JournalInput, *pb.JournalOutput) error { handed++; return nil },
				Gap:  func(error) error { return nil },
			})
			if c.gap != errors.Is(err, journal.ErrGap) {
				t.Errorf("error %v, want a gap: %v", err, c.gap)
			}
			if sc.Pairs != pairs || handed != pairs {
				t.Errorf("%d pairs read, %d handed over, want %d", sc.Pairs, handed, pairs)
			}
			if len(sc.Damage) != c.ranges || (sc.Torn != nil) != c.torn {
				t.Errorf("damage %v, torn %v", sc.Damage, sc.Torn)
			}
			if len(sc.Damage) > 0 {
				var de *journal.DamageError
				if c.gap && !errors.As(err, &de) {
					t.Errorf("error %v names no damage", err)
				}
			}
			for _, dm := range sc.Damage {
				i := slicesIndex(paths, dm.File)
				if dm.Length == 0 {
					continue
				}
				kept, err := os.ReadFile(dm.Kept)
				if err != nil || !bytes.Equal(kept, segs[i][dm.Offset:dm.Offset+dm.Length]) || !strings.Contains(dm.Error(), "kept in "+dm.Kept) {
					t.Errorf("%v: kept %d bytes (%v), not the damaged ones", dm, len(kept), err)
				}
			}
			for i, p := range paths {
				if b, _ := os.ReadFile(p); segs[i] != nil && !bytes.Equal(b, segs[i]) {
					t.Errorf("%s changed by reading", filepath.Base(p))
				}
			}
		})
	}
}

// pairsTouched counts the pairs (an input frame and the output frame
// after it) of a clean segment that have a byte in [from, to).
func pairsTouched(seg []byte, from, to int) int {
	n, pairStart := 0, 0
	for off := 16; off+8 <= len(seg); {
		end := off + 8 + int(binary.LittleEndian.Uint32(seg[off:]))
		switch seg[off+8] {
		case journal.KindInput:
			pairStart = off
		case journal.KindOutput:
			if from < end && to > pairStart {
				n++
			}
		}
		off = end
	}
	return n
}

func slicesIndex(s []string, v string) int {
	for i, x := range s {
		if x == v {
			return i
		}
	}
	return -1
}

// TestGapStopsTheVisitor: without Visitor.Gap the visitor gets nothing
// after a gap (a replay would give another robot), and Replay fails with
// ErrGap.
func TestGapStopsTheVisitor(t *testing.T) {
	d := t.TempDir()
	paths := writeCart(t, d, 60)
	seg0, _ := os.ReadFile(paths[0])
	want := pairsTouched(seg0, 0, len(seg0))
	os.Remove(paths[1])
	var seqs []uint64
	_, err := journal.Read(d, "cart", journal.Visitor{Pair: func(in *pb.JournalInput, _ *pb.JournalOutput) error {
		seqs = append(seqs, in.GetSequence())
		return nil
	}})
	if !errors.Is(err, journal.ErrGap) || len(seqs) != want || seqs[want-1] != uint64(want) {
		t.Errorf("%v; %d pairs handed over, want %d", err, len(seqs), want)
	}
}

// TestRemoveKeepsAndNeverOverwrites: a removed journal's segments and
// manifest are renamed aside, and a name taken is never reused.
func TestRemoveKeepsAndNeverOverwrites(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	for i := 0; i < 3; i++ {
		w, err := journal.Create(dir, "cart", opening, journal.Options{FS: mem})
		if err != nil {
			t.Fatal(err)
		}
		addPairs(t, w, 1, uint64(i+1))
		w.Flush()
		if err := w.Remove(); err != nil {
			t.Fatal(err)
		}
	}
	names, _ := mem.List(dir)
	sizes := map[int64]bool{}
	manifests := 0
	for _, n := range names {
		if !strings.Contains(n, ".deleted-") {
			t.Errorf("%s not deleted", n)
		}
		if strings.HasPrefix(n, "cart.manifest") {
			manifests++
		} else {
			fi, _ := mem.Stat(filepath.Join(dir, n))
			sizes[fi.Size()] = true
		}
	}
	if len(sizes) != 3 || manifests != 3 {
		t.Errorf("kept %v", names)
	}
	if ids, _ := journal.RobotsFS(mem, dir); len(ids) != 0 {
		t.Errorf("deleted robots listed: %v", ids)
	}
}

// TestDamagedManifest: a manifest that is not one stops the read with an
// error naming the file, quoting at most its first 64 bytes, and saying
// what to do; moved aside, the segments read whole and a resume writes the
// manifest again.
func TestDamagedManifest(t *testing.T) {
	d := t.TempDir()
	writeCart(t, d, 30)
	mf := journal.ManifestPath(d, "cart")
	if err := os.WriteFile(mf, bytes.Repeat([]byte("garbage "), 100_000), 0o644); err != nil {
		t.Fatal(err)
	}
	_, err := journal.Read(d, "cart", journal.Visitor{})
	if err == nil || !strings.Contains(err.Error(), mf) || !strings.Contains(err.Error(), "move it aside") || len(err.Error()) > 400 {
		t.Fatalf("read with a damaged manifest: %.500v", err)
	}
	if err := os.Rename(mf, mf+".bad"); err != nil {
		t.Fatal(err)
	}
	sc, err := journal.Read(d, "cart", journal.Visitor{})
	if err != nil || sc.Pairs != 30 {
		t.Fatalf("read without the manifest: %d pairs, %v", sc.Pairs, err)
	}
	w, err := journal.Resume(d, "cart", &sc, journal.Options{})
	if err != nil {
		t.Fatal(err)
	}
	w.Close()
	if _, err := os.Stat(mf); err != nil {
		t.Errorf("resume wrote no manifest: %v", err)
	}
}

// TestSetAsideTakesItsOwnOnly: SetAside moves a robot's manifest,
// segments and kept damaged bytes aside, leaves another robot whose id it
// begins untouched, and a robot of the same name made after it starts with
// none of its files.
func TestSetAsideTakesItsOwnOnly(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	for _, id := range []string{"cart", "cart-b"} {
		w, err := journal.Create(dir, id, opening, journal.Options{FS: mem})
		if err != nil {
			t.Fatal(err)
		}
		addPairs(t, w, 1, 3)
		w.Flush()
		w.Close()
	}
	for _, name := range []string{"cart.000000.rjl.damaged-40", "cart.000000.rjl.damaged-40.1", "cart.000000.rjl.damaged", "cart-b.000000.rjl.damaged-40"} {
		f, err := mem.OpenFile(filepath.Join(dir, name), os.O_WRONLY|os.O_CREATE|os.O_EXCL, 0o644)
		if err != nil {
			t.Fatal(err)
		}
		f.Write([]byte(name))
		f.Close()
	}
	if err := journal.SetAside(mem, dir, "cart"); err != nil {
		t.Fatal(err)
	}
	names, _ := mem.List(dir)
	var live, aside []string
	for _, n := range names {
		if strings.Contains(n, journal.DeletedMark) {
			aside = append(aside, n)
		} else {
			live = append(live, n)
		}
	}
	want := []string{"cart-b.000000.rjl", "cart-b.000000.rjl.damaged-40", "cart-b.manifest"}
	if !slices.Equal(live, want) || len(aside) != 5 {
		t.Errorf("left %v and set aside %v; want %v left and cart's 5 set aside", live, aside, want)
	}
	for _, n := range aside {
		if !strings.HasPrefix(n, "cart.") {
			t.Errorf("%s set aside with cart's", n)
		}
	}
	if ids, _ := journal.RobotsFS(mem, dir); !slices.Equal(ids, []string{"cart-b"}) {
		t.Errorf("robots with journals: %v", ids)
	}
}

var _ io.Reader = (journal.File)(nil)

// TestReplayOnFS: Replay reads the journal from ReplayOptions.FS.
func TestReplayOnFS(t *testing.T) {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	w, err := journal.Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, journal.Options{FS: mem})
	if err != nil {
		t.Fatal(err)
	}
	w.Close()
	if _, sc, err := journal.Replay(dir, "cart", journal.ReplayOptions{FS: mem}); err != nil || sc.Opening == nil {
		t.Fatalf("replay on MemFS: %v", err)
	}
}

// TestFlushPartialWriteSyncEach: with SyncEach, the entries a partial
// write counts complete are fsynced before Flush returns, so a power loss
// right after keeps them; when that fsync fails none is complete.
func TestFlushPartialWriteSyncEach(t *testing.T) {
	w, mem := newPlainJournal(t, failSegment(faultfs.OpWrite, 0, syscall.ENOSPC), journal.Options{SyncEach: true})
	addPairs(t, w, 1, 5)
	complete, err := w.Flush()
	if complete != 2 || !errors.Is(err, journal.ErrNoSpace) {
		t.Fatalf("Flush = %d, %v; want 2 and ErrNoSpace", complete, err)
	}
	check(t, mem.Crash(), 2, true)

	syncs := failSegment(faultfs.OpSync, 0, syscall.EIO)
	writes := failSegment(faultfs.OpWrite, 0, syscall.ENOSPC)
	w, mem = newPlainJournal(t, func(op faultfs.Op, path string) error {
		if err := writes(op, path); err != nil {
			return err
		}
		return syncs(op, path)
	}, journal.Options{SyncEach: true})
	addPairs(t, w, 1, 5)
	if complete, err := w.Flush(); complete != 0 || !errors.Is(err, journal.ErrNoSpace) {
		t.Fatalf("Flush with a failing fsync = %d, %v; want 0 and ErrNoSpace", complete, err)
	}
	addPairs(t, w, 1, 2)
	if complete, err := w.Flush(); complete != 2 || err != nil {
		t.Fatalf("second Flush = %d, %v", complete, err)
	}
	w.Close()
	check(t, mem, 2, true)
}

// TestCloseDropsUnflushed: Close writes nothing that was added after the
// last Flush (never acknowledged), and syncs what was flushed.
func TestCloseDropsUnflushed(t *testing.T) {
	w, mem := newJournal(t, nil, journal.Options{})
	addPairs(t, w, 1, 2)
	if complete, err := w.Flush(); complete != 2 || err != nil {
		t.Fatalf("Flush = %d, %v", complete, err)
	}
	addPairs(t, w, 3, 4)
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	check(t, mem.Crash(), 2, true)
}
