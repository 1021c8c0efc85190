package journal_test

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"syscall"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// historySegment is the segment size of the journals of these tests.
const historySegment = 8 << 10

// writeHistory writes the cart's journal in d on the OS: n pairs with a
// snapshot after every 100th, in segments of historySegment bytes, and
// returns the segment paths.
func writeHistory(t *testing.T, d string, n uint64) []string {
	t.Helper()
	return writeSegmented(t, d, n, historySegment, 100, nil)
}

// writeSegmented writes the cart's journal in d on the OS: n pairs, a
// Flush each, with a snapshot after every every-th (0: none), the first
// of them holding first if it is not nil, in segments of segment bytes;
// it returns the segment paths.
func writeSegmented(t *testing.T, d string, n uint64, segment int64, every uint64, first []byte) []string {
	t.Helper()
	w, err := journal.Create(d, "cart", opening, journal.Options{SegmentBytes: segment})
	if err != nil {
		t.Fatal(err)
	}
	for seq := uint64(1); seq <= n; seq++ {
		addPairs(t, w, seq, seq)
		if every > 0 && seq%every == 0 {
			state := []byte("state at " + fmt.Sprint(seq))
			if seq == every && first != nil {
				state = first
			}
			w.Add(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: seq, State: state}}})
		}
		if _, err := w.Flush(); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	segs, _ := journal.Segments(d, "cart")
	return segs
}

// restoreCounting reads the cart's journal in d from its last snapshot
// and resumes it, as a restart does, through a file system that counts
// the bytes read; it returns the scan, the inputs handed over after the
// snapshot and the bytes read.
func restoreCounting(t *testing.T, d string) (journal.Scan, []uint64, int64) {
	t.Helper()
	ffs := faultfs.New(journal.OS, nil)
	sc, snap, seqs, err := readFromSnapshot(ffs, d)
	if err != nil {
		t.Fatal(err)
	}
	if sc.SnapshotSequence != snap || snap == 0 {
		t.Fatalf("snapshot %d, scan says %d", snap, sc.SnapshotSequence)
	}
	w, err := journal.Resume(d, "cart", &sc, journal.Options{FS: ffs, SegmentBytes: historySegment})
	if err != nil {
		t.Fatal(err)
	}
	w.Close()
	return sc, seqs, ffs.BytesRead()
}

// readFromSnapshot reads the cart's journal in d on fsys (nil: OS) from
// its last snapshot and returns the scan, the snapshot's sequence and the
// inputs after it.
func readFromSnapshot(fsys journal.FS, d string) (sc journal.Scan, snap uint64, seqs []uint64, err error) {
	sc, err = journal.ReadFS(fsys, d, "cart", journal.Visitor{
		Snapshot: func(s *pb.JournalSnapshot) error { snap = s.GetSequence(); return nil },
		Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
			seqs = append(seqs, in.GetSequence())
			return nil
		}})
	return sc, snap, seqs, err
}

// copyGolden copies the golden journal of format version 1 into a new
// directory and returns it with the golden files' paths.
func copyGolden(t *testing.T) (string, []string) {
	tmp := t.TempDir()
	names, _ := filepath.Glob("testdata/v1/*")
	for _, n := range names {
		b, _ := os.ReadFile(n)
		os.WriteFile(filepath.Join(tmp, filepath.Base(n)), b, 0o644)
	}
	return tmp, names
}

// TestRestoreReadsFromTheLastSnapshot: a restart reads the journal from
// the last snapshot the manifest records (the rest of its segment and the
// segments after it) and, of the segments before, only the opening record,
// so what it reads does not grow with the history: after 8 and 29
// segments of history it reads at most two segments besides the manifest
// (one line a segment). The code before read every segment (and fails
// this: 8 and 29 segments read).
func TestRestoreReadsFromTheLastSnapshot(t *testing.T) {
	for _, n := range []uint64{1250, 5050} {
		d := t.TempDir()
		segs := writeHistory(t, d, n)
		sc, seqs, bytes := restoreCounting(t, d)
		if sc.Pairs != int(n) || sc.SnapshotSequence != n-50 || len(seqs) != 50 || seqs[0] != n-49 || sc.FromSegment == 0 {
			t.Errorf("%d pairs: scan of %d pairs from snapshot %d, from segment %d, %d pairs after it", n, sc.Pairs, sc.SnapshotSequence, sc.FromSegment, len(seqs))
		}
		man, _ := os.Stat(journal.ManifestPath(d, "cart"))
		// Read: the manifest twice (scan and resume), segment 0's header
		// and opening, the snapshot's frame twice (checked, then scanned),
		// and at most two segments from it on.
		read := bytes - 2*man.Size()
		if read > 2*historySegment+1024 {
			t.Errorf("%d segments of history: restore read %d bytes besides the manifest, want at most %d", len(segs), read, 2*historySegment+1024)
		}
		t.Logf("%d segments, %d pairs: %d bytes read besides the manifest (%d)", len(segs), n, read, man.Size())
	}
}

// TestOldJournalGetsItsManifestCompleted: the golden journal of format
// version 1 (written before the manifest existed) and the same journal
// with a manifest of version 1 (newest segment only) are read whole at the
// first restart, which writes a manifest of version 2 recording the sealed
// segments; the next restart starts at the recorded snapshot and finds
// the same. No segment is rewritten (TestGoldenFormatV1).
func TestOldJournalGetsItsManifestCompleted(t *testing.T) {
	for _, v1Manifest := range []bool{false, true} {
		tmp, _ := copyGolden(t)
		if v1Manifest {
			os.WriteFile(journal.ManifestPath(tmp, "cart"), []byte("reckon journal manifest 1\nnewest-segment 2\n"), 0o644)
		}
		sc, seqs, _ := restoreCounting(t, tmp)
		if sc.FromSegment != 0 || sc.FromOffset != 0 || sc.Pairs != 12 || len(seqs) != 6 {
			t.Fatalf("first restore: from %d/%d, %d pairs, %v after the snapshot", sc.FromSegment, sc.FromOffset, sc.Pairs, seqs)
		}
		m, _ := os.ReadFile(journal.ManifestPath(tmp, "cart"))
		lines := strings.Split(string(m), "\n")
		if len(lines) != 5 || lines[0] != "reckon journal manifest 2" || lines[1] != "newest-segment 2" ||
			lines[2] != "sealed 000000 bytes 309 last 6 snapshot none" || lines[3] != "sealed 000001 bytes 300 last 12 snapshot 6 at 16" {
			t.Fatalf("manifest after the first restore:\n%s", m)
		}
		sc, seqs, _ = restoreCounting(t, tmp)
		if sc.FromOffset == 0 || sc.Pairs != 12 || sc.SnapshotSequence != 6 || len(seqs) != 6 || seqs[0] != 7 {
			t.Errorf("second restore: from %d/%d, %d pairs, snapshot %d, %v after it", sc.FromSegment, sc.FromOffset, sc.Pairs, sc.SnapshotSequence, seqs)
		}
	}
}

// frameAround returns the offset of the frame of segment b that holds
// byte at.
func frameAround(t *testing.T, b []byte, at int) int {
	for off := 16; off+8 <= len(b); {
		end := off + 8 + int(binary.LittleEndian.Uint32(b[off:]))
		if at < end {
			return off
		}
		off = end
	}
	t.Fatalf("byte %d past the frames", at)
	return 0
}

// TestVerifyFindsOldDamage: a bit flipped in a sealed segment before the
// last snapshot is not read by a restart (it is not in what the restart
// needs, and the segment's size is unchanged), and Verify, which reads
// those segments, reports it with its file and offset, and the input it
// cost as a gap. It leaves the damaged bytes in place.
func TestVerifyFindsOldDamage(t *testing.T) {
	d := t.TempDir()
	segs := writeHistory(t, d, 2050)
	bad := segs[2]
	b, _ := os.ReadFile(bad)
	at := len(b) / 2
	b[at] ^= 0x10
	os.WriteFile(bad, b, 0o644)
	frame := frameAround(t, b, at)

	sc, _, _ := restoreCounting(t, d)
	if sc.FromSegment <= 2 || len(sc.Damage) != 0 {
		t.Fatalf("restore from segment %d, damage %v", sc.FromSegment, sc.Damage)
	}
	vs, err := journal.Verify(context.Background(), nil, d, "cart", sc.FromSegment, 0)
	if len(vs.Damage) != 1 || vs.Damage[0].File != bad || vs.Damage[0].Offset != int64(frame) || vs.Damage[0].Kept != "" || !errors.Is(err, journal.ErrGap) {
		t.Fatalf("verify: damage %v, %v; want at %s byte %d", vs.Damage, err, bad, frame)
	}
	if names, _ := filepath.Glob(bad + ".damaged*"); len(names) != 0 {
		t.Errorf("verify wrote %v", names)
	}
	// Undamaged, the same segments verify clean.
	b[at] ^= 0x10
	os.WriteFile(bad, b, 0o644)
	if vs, err := journal.Verify(context.Background(), nil, d, "cart", sc.FromSegment, 0); err != nil || len(vs.Damage) != 0 {
		t.Errorf("verify of the whole journal: %v %v", vs.Damage, err)
	}
}

// TestOldSegmentCutOrMissingAtRestore: a sealed segment before the last
// snapshot that is missing or shorter than the manifest recorded is found
// at restart, as it was when every segment was read: a gap naming it.
// Cut at a frame's end (a whole snapshot record gone: no input lost), it
// is reported as damage with the sizes.
func TestOldSegmentCutOrMissingAtRestore(t *testing.T) {
	for _, c := range []string{"missing", "cut", "snapshot cut"} {
		t.Run(c, func(t *testing.T) {
			d := t.TempDir()
			// A first snapshot larger than a segment: its segment ends
			// with it.
			segs := writeSegmented(t, d, 2050, historySegment, 100, make([]byte, historySegment))
			var bad string
			var cut int
			switch c {
			case "missing":
				bad = segs[2]
				os.Remove(bad)
			case "cut":
				bad = segs[2]
				b, _ := os.ReadFile(bad)
				os.WriteFile(bad, b[:len(b)-100], 0o644)
			case "snapshot cut":
				// The segment whose last record is a snapshot.
				for _, p := range segs[:len(segs)-1] {
					b, _ := os.ReadFile(p)
					for off := 16; off < len(b); off += 8 + int(binary.LittleEndian.Uint32(b[off:])) {
						if b[off+8] == journal.KindSnapshot && off+8+int(binary.LittleEndian.Uint32(b[off:])) == len(b) {
							bad, cut = p, off
						}
					}
					if bad != "" {
						os.WriteFile(bad, b[:cut], 0o644)
						break
					}
				}
				if bad == "" {
					t.Fatal("no segment ends in a snapshot")
				}
			}
			sc, err := journal.Read(d, "cart", journal.Visitor{Snapshot: func(*pb.JournalSnapshot) error { return nil }})
			if c == "snapshot cut" {
				if err != nil || len(sc.Damage) != 1 || sc.Damage[0].File != bad || sc.Damage[0].Offset != int64(cut) || !strings.Contains(sc.Damage[0].Reason, "the manifest recorded") {
					t.Errorf("read: damage %v, %v", sc.Damage, err)
				}
				return
			}
			if !errors.Is(err, journal.ErrGap) || !strings.Contains(err.Error(), filepath.Base(bad)) && !strings.Contains(err.Error(), "segment 000002 missing") {
				t.Errorf("read: %v, want a gap naming %s", err, bad)
			}
		})
	}
}

// TestRestoreFromTheSegmentBeingWritten: a journal of one segment (a young
// robot's: a segment holds up to 64 MiB, hours of inputs) is read at a
// restart from the newest snapshot on, which the snapshot hint names,
// not from the segment's start: what a restart reads is bounded by the
// snapshot interval. The code before read the whole segment (about 180
// kB here) and fails this. Verify then reads the segment up to the
// snapshot: a bit flipped there is not read by the restart, and Verify
// reports it.
func TestRestoreFromTheSegmentBeingWritten(t *testing.T) {
	d := t.TempDir()
	segs := writeSegmented(t, d, 3050, 64<<20, 100, nil)
	if len(segs) != 1 {
		t.Fatalf("%d segments", len(segs))
	}
	sc, seqs, bytes := restoreCounting(t, d)
	if sc.FromSegment != 0 || sc.FromOffset == 0 || sc.SnapshotSequence != 3000 || len(seqs) != 50 || seqs[0] != 3001 || sc.Pairs != 3050 {
		t.Fatalf("restore from segment %d byte %d, snapshot %d, %d pairs, %d after it", sc.FromSegment, sc.FromOffset, sc.SnapshotSequence, sc.Pairs, len(seqs))
	}
	fi, _ := os.Stat(segs[0])
	if limit := fi.Size() - sc.FromOffset + 4096; bytes > limit {
		t.Errorf("restore read %d bytes of a segment of %d, from byte %d: want at most %d", bytes, fi.Size(), sc.FromOffset, limit)
	}
	t.Logf("segment of %d bytes, snapshot at %d: %d bytes read", fi.Size(), sc.FromOffset, bytes)
	if vs, err := journal.Verify(context.Background(), nil, d, "cart", 0, sc.FromOffset); err != nil || len(vs.Damage) != 0 || vs.LastSequence != 3000 {
		t.Fatalf("verify up to the snapshot: %v, %v, last input %d", vs.Damage, err, vs.LastSequence)
	}
	b, _ := os.ReadFile(segs[0])
	at := int(sc.FromOffset) / 2
	b[at] ^= 0x10
	os.WriteFile(segs[0], b, 0o644)
	frame := frameAround(t, b, at)
	if sc2, _, _ := restoreCounting(t, d); sc2.FromOffset != sc.FromOffset || len(sc2.Damage) != 0 {
		t.Fatalf("restore after a flip before the snapshot: from %d, damage %v", sc2.FromOffset, sc2.Damage)
	}
	vs, err := journal.Verify(context.Background(), nil, d, "cart", 0, sc.FromOffset)
	if len(vs.Damage) != 1 || vs.Damage[0].Offset != int64(frame) || !errors.Is(err, journal.ErrGap) {
		t.Errorf("verify: damage %v, %v; want at byte %d and a gap", vs.Damage, err, frame)
	}
}

// TestSnapshotHintIsOnlyAdvice: a snapshot hint that is missing, older
// than the newest snapshot, unparsable, or names a place that holds no
// such snapshot (another offset, another input, past the end, another
// segment) never changes what a restart finds: the same last input and,
// from the snapshot it starts at, every input after it. A wrong hint
// sends it back to the manifest's record and the whole read.
func TestSnapshotHintIsOnlyAdvice(t *testing.T) {
	d := t.TempDir()
	writeSegmented(t, d, 1250, historySegment, 100, nil)
	hint := journal.HintPath(d, "cart")
	good, err := os.ReadFile(hint)
	if err != nil {
		t.Fatal(err)
	}
	var n int
	var at int64
	var seq uint64
	if _, err := fmt.Sscanf(strings.TrimPrefix(string(good), "reckon journal snapshot hint 1\n"), "segment %d at %d input %d", &n, &at, &seq); err != nil || seq != 1200 {
		t.Fatalf("hint %q: %v", good, err)
	}
	cases := map[string]string{
		"missing":     "",
		"older":       "", // written below: the snapshot before the newest
		"garbage":     "reckon journal snapshot hint 1\nsegment x\n",
		"other head":  strings.Replace(string(good), "hint 1", "hint 9", 1),
		"offset":      fmt.Sprintf("reckon journal snapshot hint 1\nsegment %06d at %d input %d\n", n, at+8, seq),
		"input":       fmt.Sprintf("reckon journal snapshot hint 1\nsegment %06d at %d input %d\n", n, at, seq+1),
		"past end":    fmt.Sprintf("reckon journal snapshot hint 1\nsegment %06d at %d input %d\n", n, at+1<<20, seq),
		"segment":     fmt.Sprintf("reckon journal snapshot hint 1\nsegment %06d at %d input %d\n", n+5, at, seq),
		"trailing":    string(good) + "x",
		"not newline": strings.TrimSuffix(string(good), "\n"),
	}
	for name, text := range cases {
		t.Run(name, func(t *testing.T) {
			switch name {
			case "missing":
				os.Remove(hint)
			case "older":
				// The previous snapshot's place: found by a whole read.
				var prev []int64
				for off, b := int64(16), mustRead(t, journal.SegmentPath(d, "cart", n)); off < int64(len(b)); off += 8 + int64(binary.LittleEndian.Uint32(b[off:])) {
					if b[off+8] == journal.KindSnapshot && off < at {
						prev = append(prev, off)
					}
				}
				if len(prev) == 0 {
					t.Skip("no older snapshot in the hint's segment")
				}
				text = fmt.Sprintf("reckon journal snapshot hint 1\nsegment %06d at %d input %d\n", n, prev[len(prev)-1], seq-100)
				os.WriteFile(hint, []byte(text), 0o644)
			default:
				os.WriteFile(hint, []byte(text), 0o644)
			}
			defer os.WriteFile(hint, good, 0o644)
			sc, snap, seqs, err := readFromSnapshot(nil, d)
			// The newest snapshot, whichever the scan started from (an
			// older one is read on to the newest).
			if err != nil || sc.Pairs != 1250 || sc.LastSequence != 1250 || snap != seq || len(seqs) != int(1250-snap) || seqs[0] != snap+1 {
				t.Errorf("read: %v, %d pairs, last %d, snapshot %d, %d after it", err, sc.Pairs, sc.LastSequence, snap, len(seqs))
			}
		})
	}
}

func mustRead(t *testing.T, path string) []byte {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// TestSnapshotHintFailureCostsNothing: a hint that cannot be written (the
// disk full at its creation or its rename) fails no Flush and leaves no
// temporary file; the next snapshot's hint is written.
func TestSnapshotHintFailureCostsNothing(t *testing.T) {
	for _, op := range []faultfs.Op{faultfs.OpCreate, faultfs.OpWrite, faultfs.OpRename} {
		t.Run(op.String(), func(t *testing.T) {
			d := t.TempDir()
			failing := true
			ffs := faultfs.New(journal.OS, func(o faultfs.Op, path string) error {
				if failing && o == op && strings.Contains(path, ".lastsnap") {
					return syscall.ENOSPC
				}
				return nil
			})
			w, err := journal.Create(d, "cart", opening, journal.Options{FS: ffs})
			if err != nil {
				t.Fatal(err)
			}
			defer w.Close()
			addPairs(t, w, 1, 10)
			w.Add(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: 10, State: []byte("s")}}})
			if n, err := w.Flush(); err != nil || n != 11 {
				t.Fatalf("Flush with the hint failing: %d, %v", n, err)
			}
			if names, _ := filepath.Glob(filepath.Join(d, "*.tmp")); len(names) != 0 {
				t.Errorf("left %v", names)
			}
			if _, err := os.Stat(journal.HintPath(d, "cart")); err == nil {
				t.Errorf("a hint after its write failed")
			}
			failing = false
			addPairs(t, w, 11, 20)
			w.Add(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: 20, State: []byte("s")}}})
			if _, err := w.Flush(); err != nil {
				t.Fatal(err)
			}
			if b, err := os.ReadFile(journal.HintPath(d, "cart")); err != nil || !strings.Contains(string(b), "input 20\n") {
				t.Errorf("hint after the next snapshot: %q, %v", b, err)
			}
		})
	}
}

// TestSetAsideTakesTheHint: a deleted robot's hint goes with its journal,
// so that a later robot of the same name starts without one; the
// set-aside journal is read from its snapshot as before.
func TestSetAsideTakesTheHint(t *testing.T) {
	d := t.TempDir()
	writeSegmented(t, d, 250, historySegment, 100, nil)
	if err := journal.SetAside(nil, d, "cart"); err != nil {
		t.Fatal(err)
	}
	if _, err := os.Stat(journal.HintPath(d, "cart")); err == nil {
		t.Fatal("the hint stayed behind")
	}
	names, _ := filepath.Glob(filepath.Join(d, "cart.lastsnap.deleted-*"))
	if len(names) != 1 {
		t.Fatalf("set aside: %v", names)
	}
	aside := "cart" + strings.TrimPrefix(filepath.Base(names[0]), "cart.lastsnap")
	var snap uint64
	sc, err := journal.Read(d, aside, journal.Visitor{Snapshot: func(s *pb.JournalSnapshot) error { snap = s.GetSequence(); return nil }})
	if err != nil || snap != 200 || sc.Pairs != 250 || sc.FromOffset == 0 {
		t.Errorf("set-aside journal: %v, snapshot %d, %d pairs, from byte %d", err, snap, sc.Pairs, sc.FromOffset)
	}
}
