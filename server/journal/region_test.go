package journal

import (
	"errors"
	"os"
	"runtime"
	"syscall"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

// checkSeqs fails unless seqs are 1 to n in order.
func checkSeqs(t *testing.T, seqs []uint64, n int) {
	t.Helper()
	if len(seqs) != n {
		t.Fatalf("%d pairs read, want %d", len(seqs), n)
	}
	for i, s := range seqs {
		if s != uint64(i+1) {
			t.Fatalf("pair %d has sequence %d", i+1, s)
		}
	}
}

// TestCopyAppendSurvivesAKill: a writer that stops without closing (the
// daemon killed) leaves its last segment ending in the zeros of its
// reserve; a reader finds every flushed pair, calls the zeros Spare
// (the pages readied ahead by Prefault included) and nothing torn; the
// journal resumes after the last pair, and once closed every segment ends
// at its last entry. On Linux the segments are written
// through a memory map, whose stores a reader sees through the page cache
// (POSIX mmap, MAP_SHARED: "write references shall change the underlying
// object"), as a restarted daemon does after a SIGKILL.
func TestCopyAppendSurvivesAKill(t *testing.T) {
	dir := t.TempDir()
	opt := Options{SegmentBytes: 16 << 10}
	w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, opt)
	if err != nil {
		t.Fatal(err)
	}
	if runtime.GOOS == "linux" && w.reg == nil {
		t.Fatal("on Linux the writer appends through a memory map")
	}
	for i := 1; i <= 2000; i++ {
		if err := w.Add(pair(uint64(i))...); err != nil {
			t.Fatal(err)
		}
		if i%10 == 0 {
			if _, err := w.Flush(); err != nil {
				t.Fatal(err)
			}
		}
		if i%100 == 50 {
			// As after the service's periodic sync: the pages ahead are
			// readied, which a reader must not see.
			if err := w.Sync(); err != nil {
				t.Fatal(err)
			}
			if err := w.Prefault(); err != nil && !errors.Is(err, syscall.EINVAL) {
				t.Fatal(err) // EINVAL: a kernel before 5.14, which cannot
			}
		}
	}
	// w is abandoned here, as a killed daemon's is.
	sc, seqs := scanCount(t, dir)
	checkSeqs(t, seqs, 2000)
	segs, _ := Segments(dir, "cart")
	if len(segs) < 3 {
		t.Fatalf("%d segments, want rotations", len(segs))
	}
	fi, _ := os.Stat(segs[len(segs)-1])
	if w.reg != nil && (sc.Spare == 0 || sc.Spare != fi.Size()-sc.Good) {
		t.Errorf("spare %d bytes, the last segment %d bytes with its last pair ending at %d", sc.Spare, fi.Size(), sc.Good)
	}
	if sc.Torn != nil || len(sc.Damage) > 0 {
		t.Errorf("torn %v, damage %v after a kill", sc.Torn, sc.Damage)
	}
	for _, p := range segs[:len(segs)-1] {
		b, _ := os.ReadFile(p)
		if b[len(b)-1] == 0 && b[len(b)-2] == 0 && b[len(b)-3] == 0 && b[len(b)-4] == 0 {
			t.Errorf("%s, rotated, ends in zeros", p)
		}
	}

	r, err := Resume(dir, "cart", &sc, opt)
	if err != nil {
		t.Fatal(err)
	}
	for i := 2001; i <= 2010; i++ {
		if err := r.Append(pair(uint64(i))...); err != nil {
			t.Fatal(err)
		}
	}
	if err := r.Close(); err != nil {
		t.Fatal(err)
	}
	sc, seqs = scanCount(t, dir)
	checkSeqs(t, seqs, 2010)
	segs, _ = Segments(dir, "cart")
	fi, _ = os.Stat(segs[len(segs)-1])
	if sc.Spare != 0 || sc.Torn != nil || fi.Size() != sc.Good {
		t.Errorf("closed: spare %d, torn %v, last segment %d bytes, its last pair ends at %d", sc.Spare, sc.Torn, fi.Size(), sc.Good)
	}
}

// TestCopyAppendAcrossWindows writes a flush larger than the mapped window
// and then many small ones past it, in one segment: every pair reads back.
func TestCopyAppendAcrossWindows(t *testing.T) {
	dir := t.TempDir()
	w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	for ; n < 120_000; n++ { // about 7 MiB in one flush
		if err := w.Add(pair(uint64(n + 1))...); err != nil {
			t.Fatal(err)
		}
	}
	if c, err := w.Flush(); c != n || err != nil {
		t.Fatalf("flush: %d of %d complete, %v", c, n, err)
	}
	for ; n < 200_000; n++ {
		if err := w.Append(pair(uint64(n + 1))...); err != nil {
			t.Fatal(err)
		}
	}
	if w.size < 2*mapWindow {
		t.Fatalf("%d bytes written, want more than two windows", w.size)
	}
	_, seqs := scanCount(t, dir) // before Close: through the page cache
	checkSeqs(t, seqs, n)
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	_, seqs = scanCount(t, dir)
	checkSeqs(t, seqs, n)
}

// TestCopyFaultIsAnError cuts the segment short under the writer's memory
// map, as another program truncating it would: the next copy touches a
// page past the end of the file, which the kernel answers with SIGBUS
// (mmap(2): "Attempted access to a portion of the buffer that does not
// correspond to the file"). The flush fails with an error wrapping EIO,
// and the daemon goes on.
func TestCopyFaultIsAnError(t *testing.T) {
	if runtime.GOOS != "linux" {
		t.Skip("the memory-mapped journal is Linux's")
	}
	dir := t.TempDir()
	w, err := Create(dir, "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer w.Close()
	if err := w.Append(pair(1)...); err != nil {
		t.Fatal(err)
	}
	if err := os.Truncate(w.segPath(), 0); err != nil {
		t.Fatal(err)
	}
	err = w.Append(pair(2)...)
	if !errors.Is(err, syscall.EIO) {
		t.Fatalf("a copy past the end of the file: %v, want EIO", err)
	}
	t.Logf("the fault: %v", err)
}

// BenchmarkFlushOnePair appends one input and its output a Flush, as a
// robot whose samples arrive one at a time does, with an fsync every 31
// flushes (a robot at 310 samples a second and the service's 100 ms
// fsync), on the operating system's file system: by a copy into the
// memory-mapped reserve (copy; Linux), the same with the pages ahead
// readied after each fsync as the service does (copy-prefault), and by
// write(2) (write: the same files behind a file system wrapper whose files
// cannot reserve).
func BenchmarkFlushOnePair(b *testing.B) {
	in := &pb.JournalInput{Sequence: 1, Sample: &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: 1, HeadingRad: 0.1}}}, SessionId: "bench-session", ClientSequence: 1}
	out := &pb.JournalOutput{Response: &pb.IngestResponse{Sequence: 1, Verdict: pb.Verdict_VERDICT_APPLIED}}
	for _, mode := range []struct {
		name     string
		fs       FS
		prefault bool
	}{{"copy", nil, false}, {"copy-prefault", nil, true}, {"write", plainFS{OS}, false}} {
		b.Run(mode.name, func(b *testing.B) {
			w, err := Create(b.TempDir(), "cart", &pb.JournalOpening{Robot: "robots/cart", Config: &pb.RobotConfig{}}, Options{FS: mode.fs})
			if err != nil {
				b.Fatal(err)
			}
			defer w.Close()
			b.ReportAllocs()
			for i := 0; b.Loop(); i++ {
				in.Sequence, out.Response.Sequence = uint64(i+1), uint64(i+1)
				if err := w.AddPair(in, out); err != nil {
					b.Fatal(err)
				}
				if _, err := w.Flush(); err != nil {
					b.Fatal(err)
				}
				if i%31 == 30 {
					if err := w.Sync(); err != nil {
						b.Fatal(err)
					}
					if mode.prefault {
						w.Prefault()
					}
				}
			}
		})
	}
}

// plainFS is an FS whose files are not *os.File, so that the journal
// appends to them by write(2).
type plainFS struct{ FS }

func (p plainFS) OpenFile(name string, flag int, perm os.FileMode) (File, error) {
	f, err := p.FS.OpenFile(name, flag, perm)
	if err != nil {
		return nil, err
	}
	return plainFile{f}, nil
}

type plainFile struct{ File }
