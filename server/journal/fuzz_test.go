package journal_test

import (
	"bytes"
	"encoding/binary"
	"hash/crc32"
	"os"
	"path/filepath"
	"testing"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
	"reckon.example/server/journal/faultfs"
)

// cleanSegment returns the bytes of a segment 0 with the opening, five
// pairs and a snapshot after the third.
func cleanSegment(f *testing.F) []byte {
	mem := faultfs.NewMem()
	mem.MkdirAll(dir, 0o755)
	w, err := journal.Create(dir, "cart", opening, journal.Options{FS: mem})
	if err != nil {
		f.Fatal(err)
	}
	for seq := uint64(1); seq <= 5; seq++ {
		w.AddPair(input(seq), output(seq))
		if seq == 3 {
			w.Add(&pb.JournalRecord{Entry: &pb.JournalRecord_Snapshot{Snapshot: &pb.JournalSnapshot{Sequence: 3, State: []byte("state")}}})
		}
	}
	w.Flush()
	w.Close()
	f2, _ := mem.OpenFile(journal.SegmentPath(dir, "cart", 0), os.O_RDONLY, 0)
	var buf bytes.Buffer
	buf.ReadFrom(f2)
	return buf.Bytes()
}

// corruptions returns b damaged in the ways the tests damage journals:
// bit flips, zeroed ranges, truncations, a cut header, a frame twice.
func corruptions(b []byte) [][]byte {
	flip := func(off int) []byte { c := bytes.Clone(b); c[off%len(c)] ^= 0x20; return c }
	zero := func(off, n int) []byte { c := bytes.Clone(b); clear(c[off:min(off+n, len(c))]); return c }
	out := [][]byte{b, b[:len(b)-3], b[:len(b)/2], b[:7], nil, b[:16], flip(3), flip(20), flip(len(b) / 2), flip(len(b) - 2),
		zero(16, 8), zero(len(b)/3, 40), zero(0, 16), append(bytes.Clone(b), b[16:60]...)}
	return out
}

// FuzzScan reads any bytes as a robot's only segment. The oracle: no
// panic; every offset reported lies within the input; the damaged ranges
// are in order, do not overlap, and were kept byte for byte; and no more
// pairs are handed over than the input has frames whose CRC-32C matches.
func FuzzScan(f *testing.F) {
	for _, c := range corruptions(cleanSegment(f)) {
		f.Add(c)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		mem := faultfs.NewMem()
		mem.MkdirAll(dir, 0o755)
		path := journal.SegmentPath(dir, "cart", 0)
		w, _ := mem.OpenFile(path, os.O_WRONLY|os.O_CREATE, 0o644)
		w.Write(b)
		w.Close()
		pairs := 0
		sc, _ := journal.ReadFS(mem, dir, "cart", journal.Visitor{
			Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
				if in == nil || out == nil {
					t.Fatal("a pair without its input or output")
				}
				pairs++
				return nil
			},
			Gap: func(error) error { return nil },
		})
		n := int64(len(b))
		if sc.Good < 0 || sc.Good > n || (sc.Torn != nil && (sc.Torn.Offset < 0 || sc.Torn.Offset > n)) {
			t.Fatalf("good %d, torn %v, for %d bytes", sc.Good, sc.Torn, n)
		}
		end := int64(0)
		for _, d := range sc.Damage {
			if d.Offset < end || d.Length < 0 || d.Offset+d.Length > n {
				t.Fatalf("damage %v after byte %d of %d", d, end, n)
			}
			end = d.Offset + d.Length
			if d.Length == 0 {
				continue
			}
			kf, err := mem.OpenFile(d.Kept, os.O_RDONLY, 0)
			if err != nil {
				t.Fatal(err)
			}
			var kept bytes.Buffer
			kept.ReadFrom(kf)
			if filepath.Dir(d.Kept) != dir || !bytes.Equal(kept.Bytes(), b[d.Offset:end]) {
				t.Fatalf("damage %v not kept as it was", d)
			}
		}
		if valid := checkedFrames(b); 2*pairs > valid {
			t.Fatalf("%d pairs handed over from %d frames whose CRC matches", pairs, valid)
		}
	})
}

// checkedFrames counts the offsets of b where a frame with a length in
// bounds and a matching CRC-32C starts, by brute force.
func checkedFrames(b []byte) int {
	table := crc32.MakeTable(crc32.Castagnoli)
	n := 0
	for p := 0; p+8 <= len(b); p++ {
		size := int(binary.LittleEndian.Uint32(b[p:]))
		if size == 0 || size > len(b)-p-8 {
			continue
		}
		if crc32.Checksum(b[p+8:p+8+size], table) == binary.LittleEndian.Uint32(b[p+4:]) {
			n++
		}
	}
	return n
}
