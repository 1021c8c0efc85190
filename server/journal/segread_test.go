package journal

import (
	"bytes"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

// TestSegmentReadInPieces: a segment read a piece at a time scans as if
// read at once, intact or damaged anywhere (bit flips, zeroed ranges,
// truncations, a frame twice, a cut header), down to pieces of a few
// bytes, with snapshots kept and with gaps gone past.
func TestSegmentReadInPieces(t *testing.T) {
	src := t.TempDir()
	writeJournal(t, src, 3000, Options{})
	clean, err := os.ReadFile(SegmentPath(src, "cart", 0))
	if err != nil {
		t.Fatal(err)
	}
	flip := func(off int) []byte { c := bytes.Clone(clean); c[off] ^= 0x20; return c }
	zero := func(off, n int) []byte { c := bytes.Clone(clean); clear(c[off : off+n]); return c }
	n := len(clean)
	cases := [][]byte{clean, clean[:n-3], clean[:n/2], clean[:7], clean[:16], flip(3), flip(20), flip(n / 3), flip(n/2 + 1), flip(n - 2),
		zero(16, 8), zero(n/3, 40), zero(0, 16), zero(n-100, 100), append(bytes.Clone(clean), clean[16:200]...), append(bytes.Clone(clean[:n/2]), clean[n/2+30:]...)}
	defer func(p int) { segmentPiece = p }(segmentPiece)
	base := t.TempDir()
	scan := func(seg []byte, piece int, snapshots bool) string {
		segmentPiece = piece
		d := filepath.Join(base, "j")
		os.RemoveAll(d)
		os.MkdirAll(d, 0o755)
		if err := os.WriteFile(SegmentPath(d, "cart", 0), seg, 0o644); err != nil {
			t.Fatal(err)
		}
		var got bytes.Buffer
		v := Visitor{ReadOnly: true,
			Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
				fmt.Fprintf(&got, "pair %d %d\n", in.GetSequence(), out.GetResponse().GetSequence())
				return nil
			},
			Gap: func(err error) error { fmt.Fprintf(&got, "gap %v\n", err); return nil }}
		if snapshots {
			v.Snapshot = func(s *pb.JournalSnapshot) error { fmt.Fprintf(&got, "snapshot %d\n", s.GetSequence()); return nil }
		}
		sc, err := Read(d, "cart", v)
		fmt.Fprintf(&got, "err %v\ngood %d segment %d pairs %d replayed %d last %d unanswered %v closed %v torn %v %q\n", err, sc.Good, sc.Segment, sc.Pairs, sc.Replayed, sc.LastSequence, sc.Unanswered, sc.Closed, sc.Torn, filepath.Base(sc.TornSegment))
		for _, dm := range sc.Damage {
			fmt.Fprintf(&got, "damage %d %d %s\n", dm.Offset, dm.Length, dm.Reason)
		}
		return got.String()
	}
	for i, seg := range cases {
		for _, snapshots := range []bool{false, true} {
			want := scan(seg, 1<<30, snapshots)
			for _, piece := range []int{1, 7, 4096, n / 3} {
				if got := scan(seg, piece, snapshots); got != want {
					g, w := strings.Split(got, "\n"), strings.Split(want, "\n")
					k := 0
					for k < min(len(g), len(w)) && g[k] == w[k] {
						k++
					}
					t.Fatalf("case %d (%d bytes), pieces of %d: the scan differs from one of the segment read at once from line %d:\ngot:\n%s\nwant:\n%s", i, len(seg), piece, k, strings.Join(g[k:min(len(g), k+5)], "\n"), strings.Join(w[k:min(len(w), k+5)], "\n"))
				}
			}
		}
	}
}

// TestSegmentPastReadLimit: a segment file past maxSegmentRead whose end
// is zeros (a sparse file, a reserve grown wild) scans as if read whole,
// its zeros spare or part of the torn tail, without reading them into
// memory; one whose end is not zeros is refused naming the file and where
// its records end, and a restore then quarantines only its robot.
func TestSegmentPastReadLimit(t *testing.T) {
	src := t.TempDir()
	writeJournal(t, src, 3000, Options{})
	clean, err := os.ReadFile(SegmentPath(src, "cart", 0))
	if err != nil {
		t.Fatal(err)
	}
	n := len(clean)
	const zeros = 8 << 20
	defer func(m int64) { maxSegmentRead = m }(maxSegmentRead)
	scan := func(seg []byte, tail []byte, limit int64) (string, error) {
		maxSegmentRead = limit
		d := filepath.Join(t.TempDir(), "j")
		os.MkdirAll(d, 0o755)
		p := SegmentPath(d, "cart", 0)
		if err := os.WriteFile(p, seg, 0o644); err != nil {
			t.Fatal(err)
		}
		// Sparse: the zeros take no disk.
		if err := os.Truncate(p, int64(len(seg))+zeros); err != nil {
			t.Fatal(err)
		}
		if len(tail) > 0 {
			f, _ := os.OpenFile(p, os.O_WRONLY|os.O_APPEND, 0)
			f.Write(tail)
			f.Close()
		}
		sc, err := Read(d, "cart", Visitor{ReadOnly: true})
		return fmt.Sprintf("good %d pairs %d spare %d torn %v damage %d", sc.Good, sc.Pairs, sc.Spare, sc.Torn, len(sc.Damage)), err
	}
	for _, seg := range [][]byte{clean, clean[:n-3]} {
		whole, err := scan(seg, nil, 1<<30)
		if err != nil {
			t.Fatal(err)
		}
		streamed, err := scan(seg, nil, 1<<20)
		if err != nil || streamed != whole {
			t.Errorf("past the limit: %s (%v); read whole: %s", streamed, err, whole)
		}
	}
	// What is read into memory stays within the limit (and its last piece).
	maxSegmentRead = 1 << 20
	p := filepath.Join(t.TempDir(), "big.rjl")
	os.WriteFile(p, clean, 0o644)
	os.Truncate(p, int64(n)+zeros)
	rd, err := openSegment(OS, p, nil, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer rd.close()
	if err := rd.rest(p, n); err != nil || cap(rd.b) > 1<<20+1 || int64(len(rd.b))+rd.zeros != int64(n)+zeros {
		t.Errorf("read %d bytes into a buffer of %d, counted %d zeros (%v); want at most %d in memory", len(rd.b), cap(rd.b), rd.zeros, err, 1<<20+1)
	}
	_, err = scan(clean, []byte("garbage"), 1<<20)
	if !errors.Is(err, ErrSegmentTooLarge) || !strings.Contains(err.Error(), "cart.000000.rjl") || !strings.Contains(err.Error(), fmt.Sprintf("truncate -s %d", n)) {
		t.Errorf("garbage after the zeros: %v", err)
	}
}
