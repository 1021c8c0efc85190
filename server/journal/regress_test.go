package journal

import (
	"bytes"
	"encoding/binary"
	"os"
	"path/filepath"
	"strings"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

// The regression tests of issue 11's journal paths ("Nothing acknowledged
// is ever lost", paths 1, 3, 4 and 6) use only the API the journal had
// before it, and each failed on that code.

// readAll reads the cart's journal and returns the scan, the error and
// the sequences of the pairs handed over.
func readAll(t *testing.T, dir string) (Scan, []uint64, error) {
	t.Helper()
	var seqs []uint64
	sc, err := Read(dir, "cart", Visitor{Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		seqs = append(seqs, in.GetSequence())
		return nil
	}})
	return sc, seqs, err
}

// frameOffsets returns the offset of every frame of a segment, in order.
func frameOffsets(b []byte) []int {
	var offs []int
	for off := headerSize; off+frameSize <= len(b); {
		offs = append(offs, off)
		off += frameSize + int(binary.LittleEndian.Uint32(b[off:]))
	}
	return offs
}

// TestRegressionHalfMadeSegment (path 1): a segment left with a cut or
// empty header by a crash while it was being started, or a stray file
// named like a segment, is not data-bearing-but-empty: the records
// appended after a restart are all there at the next one.
func TestRegressionHalfMadeSegment(t *testing.T) {
	// What the older build did next: it truncated such a segment and
	// appended records to it without a header.
	var headerless []byte
	for i := uint64(101); i <= 150; i++ {
		for _, r := range pair(i) {
			headerless, _ = AppendFrame(headerless, r)
		}
	}
	for _, c := range []struct {
		name    string
		content []byte
		pairs   int // pairs in the journal with it
	}{
		{"header cut", header()[:7], 100},
		{"empty", nil, 100},
		{"stray file", []byte("notes about the cart\n"), 100},
		{"records without a header", headerless, 150},
	} {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			opt := Options{SegmentBytes: 2048}
			writeJournal(t, dir, 100, opt)
			segs, _ := Segments(dir, "cart")
			if err := os.WriteFile(SegmentPath(dir, "cart", len(segs)), c.content, 0o644); err != nil {
				t.Fatal(err)
			}
			sc, seqs, err := readAll(t, dir)
			if err != nil || len(seqs) != c.pairs {
				t.Fatalf("first restart: %d pairs, %v", len(seqs), err)
			}
			w, err := Resume(dir, "cart", &sc, opt)
			if err != nil {
				t.Fatal(err)
			}
			for i := uint64(c.pairs + 1); i <= 600; i++ {
				if err := w.Append(pair(i)...); err != nil {
					t.Fatal(err)
				}
			}
			if err := w.Close(); err != nil {
				t.Fatal(err)
			}
			if _, seqs, err := readAll(t, dir); err != nil || len(seqs) != 600 {
				t.Errorf("second restart: %d of 600 pairs, %v", len(seqs), err)
			}
			if len(c.content) > 0 {
				kept, _ := filepath.Glob(SegmentPath(dir, "cart", len(segs)) + ".damaged*")
				if len(kept) == 0 {
					t.Errorf("the %d bytes of the bad segment were not kept", len(c.content))
				}
			}
		})
	}
}

// TestRegressionBadCRCMidJournal (path 3): one bad CRC in the middle of a
// journal of 5,000 pairs loses nothing after it. A damaged snapshot costs
// no input: the scan recovers every pair without an error. A damaged
// output costs its pair: the scan reports it, still reads every pair
// after it, and changes nothing in the file.
func TestRegressionBadCRCMidJournal(t *testing.T) {
	for _, c := range []struct {
		name      string
		record    int // frame index: 0 the opening, 2i-1 input i, 2i its output; the snapshot after output 2500
		wantPairs int
		wantErr   bool
	}{
		{"snapshot", 5001, 5000, false},
		{"output 2000", 4000, 4999, true},
		{"input 3000", 6000, 4999, true},
	} {
		t.Run(c.name, func(t *testing.T) {
			dir := t.TempDir()
			w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, Options{})
			if err != nil {
				t.Fatal(err)
			}
			for i := uint64(1); i <= 5000; i++ {
				w.Append(pair(i)...)
				if i == 2500 {
					w.Append(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: 2500, State: []byte("state")}}})
				}
			}
			w.Close()
			path := SegmentPath(dir, "cart", 0)
			b, _ := os.ReadFile(path)
			offs := frameOffsets(b)
			b[offs[c.record]+frameSize+3] ^= 0x10
			os.WriteFile(path, b, 0o644)
			sc, seqs, err := readAll(t, dir)
			if (err != nil) != c.wantErr {
				t.Errorf("error %v, want one: %v", err, c.wantErr)
			}
			if sc.Pairs != c.wantPairs {
				t.Errorf("%d pairs read, want %d", sc.Pairs, c.wantPairs)
			}
			if !c.wantErr && len(seqs) != 5000 {
				t.Errorf("%d pairs handed over, want 5000", len(seqs))
			}
			if after, _ := os.ReadFile(path); !bytes.Equal(after, b) {
				t.Errorf("the segment changed: %d bytes, were %d", len(after), len(b))
			}
		})
	}
}

// TestRegressionDeletedSegment (path 4): a segment deleted from the middle
// or the end of a journal is reported.
func TestRegressionDeletedSegment(t *testing.T) {
	for _, which := range []string{"middle", "last", "last two"} {
		t.Run(which, func(t *testing.T) {
			dir := t.TempDir()
			writeJournal(t, dir, 300, Options{SegmentBytes: 2048})
			segs, _ := Segments(dir, "cart")
			if len(segs) < 4 {
				t.Fatalf("%d segments", len(segs))
			}
			switch which {
			case "middle":
				os.Remove(segs[len(segs)/2])
			case "last":
				os.Remove(segs[len(segs)-1])
			case "last two":
				os.Remove(segs[len(segs)-1])
				os.Remove(segs[len(segs)-2])
			}
			if _, seqs, err := readAll(t, dir); err == nil {
				t.Errorf("a deleted %s segment went unnoticed (%d pairs read)", which, len(seqs))
			}
		})
	}
}

// TestRegressionDeleteSameNameTwice (path 6): deleting two robots of the
// same name, one after the other, keeps both records.
func TestRegressionDeleteSameNameTwice(t *testing.T) {
	dir := t.TempDir()
	for n := 1; n <= 2; n++ {
		w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, Options{})
		if err != nil {
			t.Fatal(err)
		}
		for i := 1; i <= n; i++ {
			w.Append(pair(uint64(i))...)
		}
		w.Append(&pb.JournalRecord{Entry: &pb.JournalRecord_Closing{Closing: &pb.JournalClosing{DeleteTimeUnixNs: 1}}})
		if err := w.Remove(); err != nil {
			t.Fatal(err)
		}
	}
	es, _ := os.ReadDir(dir)
	sizes := map[int64]bool{}
	for _, e := range es {
		if strings.HasPrefix(e.Name(), "cart.000000.rjl") || strings.HasPrefix(e.Name(), "cart.000000.deleted") {
			fi, _ := e.Info()
			sizes[fi.Size()] = true
		}
	}
	if len(sizes) != 2 {
		t.Errorf("%d deleted records of cart kept, want 2 (files %v)", len(sizes), es)
	}
}
