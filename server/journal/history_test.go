package journal_test

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
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
	vs, err := journal.Verify(context.Background(), nil, d, "cart", sc.FromSegment)
	if len(vs.Damage) != 1 || vs.Damage[0].File != bad || vs.Damage[0].Offset != int64(frame) || vs.Damage[0].Kept != "" || !errors.Is(err, journal.ErrGap) {
		t.Fatalf("verify: damage %v, %v; want at %s byte %d", vs.Damage, err, bad, frame)
	}
	if names, _ := filepath.Glob(bad + ".damaged*"); len(names) != 0 {
		t.Errorf("verify wrote %v", names)
	}
	// Undamaged, the same segments verify clean.
	b[at] ^= 0x10
	os.WriteFile(bad, b, 0o644)
	if vs, err := journal.Verify(context.Background(), nil, d, "cart", sc.FromSegment); err != nil || len(vs.Damage) != 0 {
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
