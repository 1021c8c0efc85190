package bridge

import (
	"bytes"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

// hostileScript turns fuzz bytes into a byte stream a controller and its
// line might send: each step of 6 bytes is a frame (boot byte of three, a
// counter step of -8 to +23 that wraps at 2^32, a stamp step from 0 to
// past maxStepUs, counts that step by up to 2^31, a heading or not),
// encoded and then sent as it is, with a bit flipped, cut short, twice,
// with its delimiter doubled, as a burst of noise, as an overlong run
// without a delimiter, or as an empty frame. It is what FuzzDecoderStream
// feeds the decoder: random bytes seldom make a frame whose CRC holds,
// so the Sequencer's paths would go unfuzzed.
func hostileScript(script []byte) []byte {
	var out []byte
	counter := uint32(0xfffffff0) // near the wrap from the start
	stamp := uint64(1000)
	counts := []int32{0, 0, 0}
	for len(script) >= 6 {
		st := script[:6]
		script = script[6:]
		boot := st[0] % 3
		counter += uint32(int32(st[1]%32) - 8)
		switch st[2] >> 6 {
		case 0:
			stamp += uint64(st[2]&63) * 1000 // 0 to 63 ms; 0 repeats the stamp
		case 1:
			stamp += uint64(st[2]&63) * 100_000 // to 6.3 s
		case 2:
			stamp += uint64(st[2]&63) * 2_000_000 // past maxStepUs
		default:
			stamp = uint64(st[2]&63) * 1000 // a clock started again
		}
		for i := range counts {
			counts[i] += int32(int8(st[3])) << (st[3] % 24)
		}
		f := wheels(boot, counter, stamp, counts...)
		if st[4]&1 == 1 {
			f.HasHeading, f.HeadingRad = true, float32(st[4])/100
		}
		if st[4]&2 == 2 {
			f.Counts = f.Counts[:2] // the wheel count changes
		}
		enc := AppendFrame(nil, &f, nil)
		switch st[5] % 10 {
		case 0:
			enc[int(st[5])%len(enc)] ^= 1 << (st[4] % 8)
		case 1:
			enc = enc[:int(st[5])%len(enc)]
		case 2:
			enc = append(enc, enc...)
		case 3:
			enc = append(enc, 0, 0)
		case 4:
			for i := range int(st[5]) % 40 {
				enc = append(enc, st[i%6]*uint8(i+7))
			}
		case 5:
			enc = append(bytes.Repeat([]byte{st[5] | 1}, MaxEncodedLen+int(st[4])), 0)
		case 6:
			enc = []byte{0}
		}
		out = append(out, enc...)
	}
	return out
}

// FuzzDecoderStream: whatever a controller and its line send
// (hostileScript), cut into reads of any lengths (cuts; every single byte
// included), the decoder gives the samples and counts it gives for the
// stream in one read, with a decoder resumed on the robot's run or not;
// its memory stays bounded (held frames, drops); and three clean frames of
// a new boot sent after any of it (after a delimiter that ends whatever
// half frame the line held; one that lacked only its delimiter is a frame
// and is taken first) are taken, all three, behind a run start if any
// frame was taken before: nothing valid after the damage is lost.
func FuzzDecoderStream(f *testing.F) {
	f.Add([]byte{0, 1, 5, 1, 0, 9, 0, 9, 5, 1, 0, 9, 0, 9, 5, 1, 0, 9}, []byte{1}, false)
	f.Add([]byte{1, 9, 5, 3, 1, 9, 1, 9, 5, 3, 1, 0, 1, 9, 5, 3, 1, 1, 2, 9, 200, 3, 1, 9, 2, 9, 5, 3, 1, 9}, []byte{7, 3}, true)
	f.Add([]byte{0, 9, 5, 1, 0, 2, 0, 9, 5, 1, 0, 5, 0, 9, 5, 1, 0, 6, 0, 9, 130, 1, 0, 9, 0, 9, 5, 1, 0, 9}, []byte{0, 255}, false)
	f.Add([]byte{0, 9, 5, 1, 0, 9, 0, 0, 5, 1, 0, 9, 0, 3, 5, 1, 0, 9, 0, 9, 5, 1, 0, 4}, []byte{37}, true)
	f.Add([]byte{0, 9, 5, 1, 0, 9, 0, 9, 5, 1, 0, 9, 0, 9, 193, 1, 0, 9, 0, 9, 5, 1, 0, 9}, []byte{3}, false)
	// The second frame cut one byte short, its delimiter only: the
	// tail's first byte ends it, and it confirms the first (CI found it).
	f.Add([]byte{0, 9, 5, 1, 0, 9, 0, 9, 5, 1, 0, 101}, []byte{5}, false)
	f.Fuzz(func(t *testing.T, script, cuts []byte, resume bool) {
		if len(script) > 6*400 {
			return
		}
		stream := hostileScript(script)
		var whole, chunked Decoder
		if resume {
			whole.Resume(BootID(1), 500_000)
			chunked.Resume(BootID(1), 500_000)
		}
		want := whole.Decode(nil, stream)
		var got []*pb.Sample
		rest := stream
		for i := 0; len(rest) > 0; i++ {
			n := 1
			if len(cuts) > 0 {
				n = int(cuts[i%len(cuts)]) + 1
			}
			n = min(n, len(rest))
			got = chunked.Decode(got, rest[:n])
			rest = rest[n:]
			if st := chunked.Stats(); st.Held > maxHeld || len(chunked.drops) > maxDrops || len(chunked.seq.invalidAhead) > maxDrops {
				t.Fatalf("memory past its bounds: %d held, %d drops, %d invalid counters", st.Held, len(chunked.drops), len(chunked.seq.invalidAhead))
			}
		}
		if len(got) != len(want) {
			t.Fatalf("%d samples in reads, %d in one", len(got), len(want))
		}
		for i := range want {
			if !sameSample(got[i], want[i]) {
				t.Fatalf("sample %d: %v in reads, %v in one", i, got[i], want[i])
			}
		}
		if a, b := chunked.Stats(), whole.Stats(); a != b {
			t.Fatalf("stats %+v in reads, %+v in one", a, b)
		}
		before := whole.Stats()
		tail := []byte{0}
		for k := range 3 {
			tail = AppendFrame(tail, &Frame{Type: FrameWheels, Boot: 0x7f, Counter: uint32(k), StampUs: uint64(k+1) * 1000, Counts: []int32{int32(k), 2 * int32(k)}}, nil)
		}
		after := whole.Decode(nil, tail)
		// The line's unfinished bytes may be a whole frame that lacked only
		// its delimiter (a frame cut one byte short), which the tail's
		// first byte ends: that frame is valid and taken, with what it
		// confirms, before the clean frames. The tail then split one frame
		// more than its three.
		if len(after) < 3 {
			t.Fatalf("%d samples of the 3 clean frames after the damage (stats before %+v, after %+v)", len(after), before, whole.Stats())
		}
		earlier, clean := after[:len(after)-3], after[len(after)-3:]
		var runStart *pb.RunStart
		if n := len(earlier); n > 0 && earlier[n-1].GetRunStart() != nil {
			runStart, earlier = earlier[n-1].GetRunStart(), earlier[:n-1]
		}
		taken := before.Samples
		for _, s := range earlier {
			if s.GetRunStart() != nil && s.GetRunStart().GetBootId() == BootID(0x7f) {
				t.Fatalf("a run start of the clean frames' boot before the last three samples: %v", after)
			}
			if s.GetOdometry() != nil {
				taken++
			}
		}
		if len(earlier) > 0 && whole.Stats().Frames != before.Frames+4 {
			t.Fatalf("%d samples before the clean frames' although the tail ended no frame of the script's (stats before %+v, after %+v)", len(earlier), before, whole.Stats())
		}
		switch {
		case runStart != nil && runStart.GetBootId() != BootID(0x7f):
			t.Fatalf("run start %v before the clean frames", runStart)
		case runStart == nil && taken > 0:
			t.Fatalf("no run start for a new boot after %d samples: %v", taken, after)
		}
		after = clean
		for k, s := range after {
			o := s.GetOdometry()
			if o.GetStampNs() != int64(k+1)*1e6 || len(o.GetCounts().GetCounts()) != 2 || o.GetCounts().GetCounts()[1] != 2*int64(k) {
				t.Fatalf("clean frame %d gave %v", k, s)
			}
		}
	})
}

// sameSample compares two samples field by field (a run start, or
// odometry by its stamp, counts and heading).
func sameSample(a, b *pb.Sample) bool {
	if a.GetRunStart() != nil || b.GetRunStart() != nil {
		return a.GetRunStart().GetBootId() == b.GetRunStart().GetBootId() && (a.GetRunStart() == nil) == (b.GetRunStart() == nil)
	}
	return sameSamples([]sampleOf{short(a)}, []sampleOf{short(b)})
}

// TestFastBootToggleKeepsItsStart: a controller sending 1000 frames a
// second that boots to the byte before the last while the last boot's
// clock is at 0.5 s has its frames held until they span 1.5 s (lateUs less
// that stamp), 1500 frames, more than maxHeld. The new run starts at the
// boot's first frame and ends at its last, its travel whole: the held
// frames dropped are ones between the first and the newest, whose counts
// the newer ones cover, counted as reordered and not also as skipped.
// Before, the oldest were dropped: the run started at the 477th frame and
// the travel over the first 476 ms was lost.
func TestFastBootToggleKeepsItsStart(t *testing.T) {
	var frames []Frame
	for i, b := range []struct {
		boot uint8
		n    int
	}{{1, 1000}, {2, 500}, {1, 2000}} {
		for k := range b.n {
			frames = append(frames, wheels(b.boot, uint32(k), uint64(1000+1000*k), int32(7*k+i)))
		}
	}
	var d Decoder
	ss := d.Decode(nil, encode(frames...))
	var third []*pb.Sample
	runs := 0
	for _, s := range ss {
		if s.GetRunStart() != nil {
			runs++
			continue
		}
		if runs == 2 {
			third = append(third, s)
		}
	}
	if runs != 2 || len(third) == 0 {
		t.Fatalf("%d run starts, %d samples in the third boot", runs, len(third))
	}
	first, last := third[0].GetOdometry(), third[len(third)-1].GetOdometry()
	if first.GetStampNs() != 1e6 || first.GetCounts().GetCounts()[0] != 2 || last.GetStampNs() != 2000e6 || last.GetCounts().GetCounts()[0] != 7*1999+2 {
		t.Errorf("the third boot's samples run from %v to %v; want from its first frame (1 ms, count 2) to its last (2 s, count %d)", first, last, 7*1999+2)
	}
	st := d.Stats()
	if st.Samples+st.Reordered != 3500 || st.Skipped != 0 || st.Held != 0 || st.Invalid+st.Duplicates != 0 {
		t.Errorf("stats %+v: want every frame a sample or reordered, none skipped", st)
	}
}
