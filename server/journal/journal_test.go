package journal

import (
	"bytes"
	"errors"
	"io"
	"os"
	"strings"
	"testing"

	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

func pair(seq uint64) []*pb.JournalRecord {
	return []*pb.JournalRecord{
		{Entry: &pb.JournalRecord_Input{Input: &pb.JournalInput{Sequence: seq, Sample: &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: int64(seq), HeadingRad: 0.1}}}}}},
		{Entry: &pb.JournalRecord_Output{Output: &pb.JournalOutput{Response: &pb.IngestResponse{Sequence: seq, Verdict: pb.Verdict_VERDICT_APPLIED}}}},
	}
}

func writeJournal(t *testing.T, dir string, n int, opt Options) {
	t.Helper()
	w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, opt)
	if err != nil {
		t.Fatal(err)
	}
	for i := 1; i <= n; i++ {
		if err := w.Append(pair(uint64(i))...); err != nil {
			t.Fatal(err)
		}
	}
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
}

func scanCount(t *testing.T, dir string) (Scan, []uint64) {
	t.Helper()
	var seqs []uint64
	sc, err := Read(dir, "cart", Visitor{Pair: func(in *pb.JournalInput, out *pb.JournalOutput) error {
		if in.GetSequence() != out.GetResponse().GetSequence() {
			t.Errorf("input %d paired with output %d", in.GetSequence(), out.GetResponse().GetSequence())
		}
		seqs = append(seqs, in.GetSequence())
		return nil
	}})
	if err != nil {
		t.Fatal(err)
	}
	return sc, seqs
}

func TestJournalRoundTripAndRotation(t *testing.T) {
	dir := t.TempDir()
	writeJournal(t, dir, 500, Options{SegmentBytes: 4096})
	segs, _ := Segments(dir, "cart")
	if len(segs) < 3 {
		t.Fatalf("%d segments, want rotation", len(segs))
	}
	sc, seqs := scanCount(t, dir)
	if sc.Torn != nil || len(seqs) != 500 || seqs[499] != 500 {
		t.Errorf("scan: torn %v, %d pairs", sc.Torn, len(seqs))
	}
	ids, _ := Robots(dir)
	if len(ids) != 1 || ids[0] != "cart" {
		t.Errorf("robots %v", ids)
	}
}

// TestJournalFirstSegmentMissing: a journal whose first segment is gone
// (a half-copied directory) is a gap naming that segment, with or without
// Visitor.Gap: only the first segment holds the opening record, so nothing
// can be read past it. The scan said "an input before the opening record"
// of the second segment.
func TestJournalFirstSegmentMissing(t *testing.T) {
	dir := t.TempDir()
	writeJournal(t, dir, 500, Options{SegmentBytes: 4096})
	segs, _ := Segments(dir, "cart")
	if len(segs) < 3 {
		t.Fatalf("%d segments, want rotation", len(segs))
	}
	if err := os.Remove(segs[0]); err != nil {
		t.Fatal(err)
	}
	for _, v := range []Visitor{{}, {Gap: func(error) error { return nil }}} {
		_, err := Read(dir, "cart", v)
		if !errors.Is(err, ErrGap) || !strings.Contains(err.Error(), "segment 000000 missing") || !strings.Contains(err.Error(), segs[1]) {
			t.Errorf("scan without the first segment (Gap set %v): %v", v.Gap != nil, err)
		}
	}
}

// TestJournalFirstSegmentEmpty: a first segment that holds no opening
// record (empty, as a copy cut short leaves it, or not a journal at all)
// is an error naming that segment; it said only "journal for cart has no
// opening record".
func TestJournalFirstSegmentEmpty(t *testing.T) {
	for _, content := range [][]byte{nil, []byte("NOTAJOURNAL12345 and more bytes that are no frames")} {
		dir := t.TempDir()
		writeJournal(t, dir, 20, Options{})
		if err := os.WriteFile(SegmentPath(dir, "cart", 0), content, 0o644); err != nil {
			t.Fatal(err)
		}
		_, err := Read(dir, "cart", Visitor{ReadOnly: true})
		if err == nil || !strings.Contains(err.Error(), "no opening record") || !strings.Contains(err.Error(), SegmentPath(dir, "cart", 0)) {
			t.Errorf("first segment of %d bytes: %v; want an error naming it", len(content), err)
		}
	}
}

// TestJournalTornTail: a journal cut anywhere, or with its last record
// corrupted, gives every complete input and output before the damage.
func TestJournalTornTail(t *testing.T) {
	dir := t.TempDir()
	writeJournal(t, dir, 20, Options{})
	path := SegmentPath(dir, "cart", 0)
	whole, _ := os.ReadFile(path)
	jr, _ := NewReader(bytes.NewReader(whole))
	jr.Next() // the opening
	start := jr.Offset()
	pairSize := (int64(len(whole)) - start) / 20 // all 20 pairs encode to the same size
	for cut := len(whole) - 1; cut > len(whole)-200; cut -= 7 {
		if err := os.WriteFile(path, whole[:cut], 0o644); err != nil {
			t.Fatal(err)
		}
		sc, seqs := scanCount(t, dir)
		if sc.Torn == nil && sc.Good != int64(cut) {
			t.Fatalf("cut at %d inside a record: not reported", cut)
		}
		if want := (int64(cut) - start) / pairSize; int64(len(seqs)) != want {
			t.Errorf("cut at %d: %d pairs recovered, want %d", cut, len(seqs), want)
		}
		if sc.Good > int64(cut) {
			t.Errorf("good offset %d past the cut %d", sc.Good, cut)
		}
	}
	bad := append([]byte(nil), whole...)
	bad[len(bad)-3] ^= 0xff
	os.WriteFile(path, bad, 0o644)
	sc, seqs := scanCount(t, dir)
	if sc.Torn == nil || !strings.Contains(sc.Torn.Reason, "CRC") || len(seqs) != 19 {
		t.Errorf("corrupt last record: torn %v, %d pairs", sc.Torn, len(seqs))
	}
	// Resuming truncates the damage and appends after the last good pair.
	w, err := Resume(dir, "cart", &sc, Options{})
	if err != nil {
		t.Fatal(err)
	}
	w.Append(pair(20)...)
	w.Close()
	if sc2, seqs := scanCount(t, dir); sc2.Torn != nil || len(seqs) != 20 {
		t.Errorf("after resume: torn %v, %d pairs", sc2.Torn, len(seqs))
	}
}

func TestJournalBadHeader(t *testing.T) {
	if _, err := NewReader(strings.NewReader("NOTAJOURNAL12345")); !errors.Is(err, ErrBadHeader) {
		t.Errorf("bad magic: %v", err)
	}
	h := header()
	h[8] = 9
	if _, err := NewReader(bytes.NewReader(h)); !errors.Is(err, ErrBadHeader) {
		t.Errorf("bad version: %v", err)
	}
}

// FuzzJournalReader: any bytes after a valid header give records or a
// TornError at an offset no further than the input; never a panic, and a
// record read is one that re-encodes to the same bytes' meaning.
func FuzzJournalReader(f *testing.F) {
	var seed []byte
	seed = append(seed, header()...)
	for _, r := range pair(1) {
		seed, _ = AppendFrame(seed, r)
	}
	f.Add(seed)
	f.Add(seed[:len(seed)-4])
	f.Add(header())
	// The corruption cases of the scanner's tests: bit flips in a frame's
	// length, CRC and payload, a zeroed frame, a duplicated frame.
	for _, off := range []int{headerSize + 1, headerSize + 5, headerSize + 9, len(seed) - 2} {
		c := bytes.Clone(seed)
		c[off] ^= 0x10
		f.Add(c)
	}
	z := bytes.Clone(seed)
	clear(z[headerSize : headerSize+frameSize])
	f.Add(z)
	f.Add(append(bytes.Clone(seed), seed[headerSize:]...))
	f.Fuzz(func(t *testing.T, b []byte) {
		jr, err := NewReader(bytes.NewReader(b))
		if err != nil {
			return
		}
		for {
			rec, err := jr.Next()
			if errors.Is(err, io.EOF) {
				return
			}
			var torn *TornError
			if errors.As(err, &torn) {
				if torn.Offset > int64(len(b)) {
					t.Fatalf("torn offset %d past %d bytes", torn.Offset, len(b))
				}
				return
			}
			if err != nil {
				t.Fatal(err)
			}
			if _, err := proto.Marshal(rec); err != nil {
				t.Fatal(err)
			}
			if jr.Offset() > int64(len(b)) {
				t.Fatalf("offset %d past %d bytes", jr.Offset(), len(b))
			}
		}
	})
}

// TestAddPairMatchesRecords: the wrapper-free framing, from the messages
// (AddPair) or from their wire bytes (AddEncodedPair), writes the same
// bytes as protobuf's encoding of the JournalRecord messages, with and
// without a pose, and with the zero values proto3 leaves out.
func TestAddPairMatchesRecords(t *testing.T) {
	odo := &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StampNs: 5e6, StartNs: 0,
		Motion: &pb.OdometrySample_Travel{Travel: &pb.WheelTravel{TravelM: []float64{0.01, 0.012, -0.001}}}}}}
	pose := &pb.FusedPose{Robot: "robots/cart", StampNs: 5e6, Pose: &pb.FloorPose{XM: 1, YM: -2, HeadingRad: 0.3},
		Covariance: &pb.Covariance{Dimension: 3, Values: []float64{1e-4, 0, 0, 0, 1e-4, 0, 0, 0, 1e-3}}, Trusted: true, Sequence: 50}
	cases := []struct {
		name string
		in   *pb.JournalInput
		out  *pb.JournalOutput
	}{
		{"heading", pair(7)[0].GetInput(), pair(7)[1].GetOutput()},
		{"odometry with pose", &pb.JournalInput{Sequence: 50, Sample: odo, ArrivalUnixNs: 1_780_000_000_123_456_789},
			&pb.JournalOutput{Response: &pb.IngestResponse{ClientSequence: 9, Sequence: 50, Verdict: pb.Verdict_VERDICT_APPLIED,
				Events: []*pb.FusionEvent{{Kind: pb.EventKind_EVENT_KIND_SLIP_SUSPECTED, StampNs: 5e6, Value: 31.5, Detail: "wheel 2"}}}, Pose: pose}},
		{"zero sequence and arrival, empty sample", &pb.JournalInput{Sample: &pb.Sample{}}, &pb.JournalOutput{Response: &pb.IngestResponse{}}},
		{"arrival before 1970", &pb.JournalInput{Sequence: 1, Sample: odo, ArrivalUnixNs: -5}, &pb.JournalOutput{Response: &pb.IngestResponse{Sequence: 1}}},
	}
	for _, c := range cases {
		want, _ := AppendFrame(nil, &pb.JournalRecord{Entry: &pb.JournalRecord_Input{Input: c.in}})
		want, _ = AppendFrame(want, &pb.JournalRecord{Entry: &pb.JournalRecord_Output{Output: c.out}})
		sample, _ := proto.MarshalOptions{Deterministic: true}.Marshal(c.in.GetSample())
		resp, _ := proto.MarshalOptions{Deterministic: true}.Marshal(c.out.GetResponse())
		w := &Writer{buf: []byte("kept")}
		if err := w.AddEncodedPair(c.in.GetSequence(), sample, c.in.GetArrivalUnixNs(), resp, c.out.GetPose()); err != nil {
			t.Fatal(c.name, err)
		}
		if !bytes.Equal(w.buf, append([]byte("kept"), want...)) {
			t.Errorf("%s: AddEncodedPair wrote\n%x\nwant\n%x", c.name, w.buf[4:], want)
		}
		w = &Writer{}
		if err := w.AddPair(c.in, c.out); err != nil || !bytes.Equal(w.buf, want) {
			t.Errorf("%s: AddPair wrote\n%x (%v)\nwant\n%x", c.name, w.buf, err, want)
		}
	}
}

// TestAddEncodedPairTooLarge: a record over the limit is refused and the
// buffer keeps what it held.
func TestAddEncodedPairTooLarge(t *testing.T) {
	w := &Writer{buf: []byte("kept")}
	err := w.AddEncodedPair(1, make([]byte, MaxRecordBytes), 1, nil, nil)
	if err == nil || !strings.Contains(err.Error(), "exceeds") {
		t.Fatalf("err = %v, want a size error", err)
	}
	if string(w.buf) != "kept" {
		t.Fatalf("buffer is %q after a refused record", w.buf[:min(len(w.buf), 16)])
	}
}
