package bridge

import (
	"bytes"
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	pb "reckon.example/proto/reckon/v1"
)

func wheels(boot uint8, counter uint32, stampUs uint64, counts ...int32) Frame {
	return Frame{Type: FrameWheels, Boot: boot, Counter: counter, StampUs: stampUs, Counts: counts}
}

func encode(frames ...Frame) []byte {
	var b []byte
	for i := range frames {
		b = AppendFrame(b, &frames[i], nil)
	}
	return b
}

// sampleOf is a short form of an odometry sample for comparisons.
type sampleOf struct {
	stampNs int64
	counts  []int64
	heading float64 // NaN-free: -100 when absent
}

func short(s *pb.Sample) sampleOf {
	o := s.GetOdometry()
	h := -100.0
	if o.ImuHeadingRad != nil {
		h = o.GetImuHeadingRad()
	}
	return sampleOf{o.GetStampNs(), o.GetCounts().GetCounts(), h}
}

func shorts(ss []*pb.Sample) []sampleOf {
	var out []sampleOf
	for _, s := range ss {
		out = append(out, short(s))
	}
	return out
}

func sameSamples(a, b []sampleOf) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i].stampNs != b[i].stampNs || a[i].heading != b[i].heading || len(a[i].counts) != len(b[i].counts) {
			return false
		}
		for j := range a[i].counts {
			if a[i].counts[j] != b[i].counts[j] {
				return false
			}
		}
	}
	return true
}

func TestSequencer(t *testing.T) {
	const late = 1<<40 + 3 // microseconds, 12.7 days after boot
	cases := []struct {
		name   string
		frames []Frame
		want   []sampleOf
		stats  Stats
	}{
		{"in order", []Frame{wheels(1, 10, 1000, 5), wheels(1, 11, 2000, 7)},
			[]sampleOf{{1_000_000, []int64{5}, -100}, {2_000_000, []int64{7}, -100}}, Stats{Samples: 2}},
		{"duplicate and reordered dropped, gap skipped", []Frame{wheels(1, 10, 1000, 5), wheels(1, 10, 1000, 5), wheels(1, 13, 4000, 9), wheels(1, 12, 3000, 8), wheels(1, 14, 5000, 10)},
			[]sampleOf{{1_000_000, []int64{5}, -100}, {4_000_000, []int64{9}, -100}, {5_000_000, []int64{10}, -100}},
			Stats{Samples: 3, Duplicates: 1, Reordered: 1, Skipped: 2}},
		{"stamp past 2^32 us", []Frame{wheels(0, 1, late, 0), wheels(0, 2, late+1000, 1)},
			[]sampleOf{{late * 1000, []int64{0}, -100}, {(late + 1000) * 1000, []int64{1}, -100}}, Stats{Samples: 2}},
		{"stamp behind with counter ahead", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 4000, 1), wheels(0, 3, 6000, 2)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {6_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1, Skipped: 1}},
		// The service refuses odometry not after the newest (time_backwards):
		// a frame read within the same microsecond is the link's to drop,
		// its counts carried by the next frame.
		{"same stamp with counter ahead", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 5000, 1), wheels(0, 3, 6000, 2)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {6_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1, Skipped: 1}},
		// A firmware that extends a 32-bit microsecond timer and reads its
		// two halves without care puts one frame 2^32 us (71.6 min) ahead
		// (PROTOCOL.md, "Stamps"). Taken, it would send the service a
		// sample over an hour ahead and drop every later frame as behind it.
		{"one stamp jumps 2^32 us ahead", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 5000+10000+1<<32, 1), wheels(0, 3, 25000, 2), wheels(0, 4, 35000, 3)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {25_000_000, []int64{2}, -100}, {35_000_000, []int64{3}, -100}}, Stats{Samples: 3, Invalid: 1, Skipped: 1}},
		// A controller that really sent nothing for two hours (held in a
		// debugger): the frame after the jump confirms it and is taken.
		{"a jump confirmed by the next frame", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 7_200_005_000, 1), wheels(0, 3, 7_200_015_000, 2)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {7_200_015_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1, Skipped: 1}},
		{"frame counter wraps", []Frame{wheels(0, 1<<32-1, 10, 0), wheels(0, 0, 20, 1), wheels(0, 1<<32-1, 10, 0)},
			[]sampleOf{{10_000, []int64{0}, -100}, {20_000, []int64{1}, -100}}, Stats{Samples: 2, Reordered: 1}},
		{"int32 counts unwrap", []Frame{wheels(0, 1, 10, 2147483000, -2147483000), wheels(0, 2, 20, -2147483000, 2147483000)},
			[]sampleOf{{10_000, []int64{2147483000, -2147483000}, -100}, {20_000, []int64{2147484296, -2147484296}, -100}}, Stats{Samples: 2}},
		{"wheel count changes", []Frame{wheels(0, 1, 10, 1, 2), wheels(0, 2, 20, 1), wheels(0, 3, 30, 3, 4)},
			[]sampleOf{{10_000, []int64{1, 2}, -100}, {30_000, []int64{3, 4}, -100}}, Stats{Samples: 2, Invalid: 1, Skipped: 1}},
		{"restart, late frame of the old boot dropped", []Frame{wheels(4, 900, 9000, 50), wheels(5, 0, 30, 0), wheels(4, 899, 8000, 40), wheels(5, 1, 40, 2)},
			[]sampleOf{{9_000_000, []int64{50}, -100}, {30_000, []int64{0}, -100}, {40_000, []int64{2}, -100}},
			Stats{Samples: 3, Restarts: 1, Reordered: 1}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var s Sequencer
			var got []*pb.Sample
			for i := range c.frames {
				if smp := s.Take(&c.frames[i]); smp != nil {
					got = append(got, smp)
				}
			}
			if !sameSamples(shorts(got), c.want) {
				t.Errorf("samples\n got %v\nwant %v", shorts(got), c.want)
			}
			if s.stats != c.stats {
				t.Errorf("stats %+v, want %+v", s.stats, c.stats)
			}
		})
	}
}

// TestStaleBootTakenAfterLimit: a controller that reboots twice and draws
// its earlier boot byte again is followed after staleBootLimit frames.
func TestStaleBootTakenAfterLimit(t *testing.T) {
	var s Sequencer
	s.Take(&Frame{Type: FrameWheels, Boot: 1, Counter: 5, StampUs: 100, Counts: []int32{0}})
	s.Take(&Frame{Type: FrameWheels, Boot: 2, Counter: 0, StampUs: 10, Counts: []int32{0}})
	taken := 0
	for i := range staleBootLimit + 3 {
		if s.Take(&Frame{Type: FrameWheels, Boot: 1, Counter: uint32(i), StampUs: uint64(10 * i), Counts: []int32{0}}) != nil {
			taken++
		}
	}
	if taken != 3 || s.stats.Restarts != 2 || s.stats.Reordered != staleBootLimit {
		t.Errorf("taken %d, stats %+v", taken, s.stats)
	}
}

// TestDecoderResync: garbage, a frame cut short, a run without delimiter
// longer than any frame and a corrupted frame are each dropped, and the
// decoder picks up the next frame.
func TestDecoderResync(t *testing.T) {
	f1, f2, f3 := wheels(0, 1, 100, 1, 2), wheels(0, 2, 200, 3, 4), wheels(0, 3, 300, 5, 6)
	e2 := encode(f2)
	bad := bytes.Clone(encode(f3))
	bad[5] ^= 0x40
	if bad[5] == 0 {
		t.Fatal("the flipped bit made a delimiter; pick another byte")
	}
	stream := cat([]byte{0x33, 0x44}, []byte{0}, encode(f1), e2[:len(e2)/2], []byte{0},
		bytes.Repeat([]byte{0x07}, 2*MaxEncodedLen), []byte{0}, bad, []byte{0, 0}, encode(f2, f3))
	var d Decoder
	got := shorts(d.Decode(nil, stream))
	want := []sampleOf{{100_000, []int64{1, 2}, -100}, {200_000, []int64{3, 4}, -100}, {300_000, []int64{5, 6}, -100}}
	if !sameSamples(got, want) {
		t.Errorf("samples\n got %v\nwant %v", got, want)
	}
	if st := d.Stats(); st.Corrupted != 4 || st.Frames != 3 || st.Samples != 3 {
		t.Errorf("stats %+v, want 4 corrupted, 3 frames, 3 samples", st)
	}
	// The same stream in pieces of every size gives the same samples.
	for size := 1; size < 40; size++ {
		var d Decoder
		var ss []*pb.Sample
		for p := stream; len(p) > 0; {
			n := min(size, len(p))
			ss = d.Decode(ss, p[:n])
			p = p[n:]
		}
		if !sameSamples(shorts(ss), want) || d.Stats() != (Stats{Frames: 3, Corrupted: 4, Samples: 3}) {
			t.Fatalf("pieces of %d bytes: %v, %+v", size, shorts(ss), d.Stats())
		}
	}
}

// FuzzDecoder: on any input the decoder does not panic, every frame the
// splitter returns re-encodes to bytes found delimited in the input (so it
// was received with a valid CRC), and there are never more samples than
// frames; a run start comes before the first sample of each restart, and
// within a run time never goes back.
func FuzzDecoder(f *testing.F) {
	f.Add(encode(wheels(0, 1, 100, 1, 2), wheels(0, 2, 200, 3, 4)))
	f.Add(cat([]byte{1, 2, 0}, encode(wheels(9, 7, MaxStampUs, -5)), encode(wheels(9, 8, 3, -4)), []byte{5}))
	hf := wheels(1, 1, 1, 1, 2, 3)
	hf.HasHeading, hf.HeadingRad = true, 1.5
	f.Add(encode(hf, wheels(2, 0, 0, 0, 0, 0)))
	r := rand.New(rand.NewPCG(1, 2))
	noisy := encode(wheels(0, 1, 10, 1), wheels(0, 2, 20, 2), wheels(0, 3, 30, 3))
	for range 3 {
		noisy[r.IntN(len(noisy))] ^= byte(1 << r.IntN(8))
	}
	f.Add(noisy)
	f.Fuzz(func(t *testing.T, data []byte) {
		var sp Splitter
		frames := sp.AppendFrames(nil, data)
		for i := range frames {
			raw := AppendRawFrame(nil, &frames[i])
			if Checksum(raw[:len(raw)-4]) != uint32(raw[len(raw)-4])|uint32(raw[len(raw)-3])<<8|uint32(raw[len(raw)-2])<<16|uint32(raw[len(raw)-1])<<24 {
				t.Fatalf("frame %d: CRC does not hold", i)
			}
			enc := AppendFrame(nil, &frames[i], nil)
			if !bytes.HasPrefix(data, enc) && !bytes.Contains(data, append([]byte{0}, enc...)) {
				t.Fatalf("frame %d (%+v) is not in the input as % x", i, frames[i], enc)
			}
		}
		var d Decoder
		samples := d.Decode(nil, data)
		st := d.Stats()
		var odometry, starts uint64
		var last int64 = -1
		for i, s := range samples {
			if s.GetRunStart() != nil {
				if i+1 == len(samples) || samples[i+1].GetOdometry() == nil {
					t.Fatalf("run start %d is not followed by odometry", i)
				}
				starts++
				last = -1
				continue
			}
			odometry++
			// The service refuses odometry not after its newest.
			if s.GetOdometry().GetStampNs() <= last {
				t.Fatalf("sample %d does not go forward in time within a run: %d after %d", i, s.GetOdometry().GetStampNs(), last)
			}
			last = s.GetOdometry().GetStampNs()
		}
		// Every frame dropped is given back with why (up to maxDrops).
		drops := d.Drops(nil)
		if dropped := st.Corrupted + st.Invalid; uint64(len(drops)) < min(dropped, maxDrops) {
			t.Fatalf("%d drops for %d frames dropped: %+v", len(drops), dropped, st)
		}
		for _, dr := range drops {
			if dr.Err == nil || dr.Err.Field == "" {
				t.Fatalf("a drop without its reason: %+v", dr)
			}
		}
		if odometry != st.Samples || starts != st.Restarts || odometry > uint64(len(frames)) || st.Frames != uint64(len(frames))+sp.invalid {
			t.Fatalf("%d samples (%d run starts), %d frames (+%d invalid), stats %+v", odometry, starts, len(frames), sp.invalid, st)
		}
		if st.Samples+st.Duplicates+st.Reordered+st.Invalid != st.Frames {
			t.Fatalf("frames do not add up: %+v", st)
		}
	})
}

// TestDecoderRunStart: a controller restart (another boot byte) puts a run
// start naming the new boot before its first sample; a decoder resumed on
// a robot whose current run is of another boot starts a run at its first
// frame, and one resumed on the same boot does not; on a run of no link
// boot, the first frame's stamp decides: at or before the robot's newest
// odometry, the controller's clock started again.
func TestDecoderRunStart(t *testing.T) {
	kinds := func(samples []*pb.Sample) string {
		var b strings.Builder
		for _, s := range samples {
			if rs := s.GetRunStart(); rs != nil {
				b.WriteString("start(" + rs.GetBootId() + ") ")
			} else {
				fmt.Fprintf(&b, "odo(%d) ", s.GetOdometry().GetStampNs())
			}
		}
		return b.String()
	}
	var d Decoder
	got := kinds(d.Decode(nil, encode(wheels(4, 900, 9000, 50), wheels(5, 0, 30, 0), wheels(4, 899, 8000, 40), wheels(5, 1, 40, 2))))
	if want := "odo(9000000) start(link-boot-05) odo(30000) odo(40000) "; got != want {
		t.Errorf("restart:\n got %s\nwant %s", got, want)
	}
	for _, c := range []struct {
		resume string
		newest int64 // the robot's newest odometry, ns
		want   string
	}{
		{"link-boot-04", 0, "start(link-boot-05) odo(30000) "},
		{"link-boot-04", 9_000_000, "start(link-boot-05) odo(30000) "},
		{"link-boot-05", 9_000_000, "odo(30000) "}, // the boot byte decides
		{"", 0, "odo(30000) "},                     // a new robot
		{"", 29_999, "odo(30000) "},                // the controller ran on
		{"", 30_000, "start(link-boot-05) odo(30000) "},
		{"", 9_000_000, "start(link-boot-05) odo(30000) "}, // its clock started again
		{"by-hand-1", 20_000, "odo(30000) "},
		{"by-hand-1", 9_000_000, "start(link-boot-05) odo(30000) "},
		{"link-boot-5", 9_000_000, "start(link-boot-05) odo(30000) "}, // not a link boot id: two hex digits
	} {
		var d Decoder
		d.Resume(c.resume, c.newest)
		if got := kinds(d.Decode(nil, encode(wheels(5, 0, 30, 0)))); got != c.want {
			t.Errorf("resumed on %q: %s, want %s", c.resume, got, c.want)
		}
	}
}

// TestDecoderDrops: every frame dropped as corrupted or invalid is given
// back by Drops with the field that was wrong, as many as Stats counts:
// random bytes between delimiters of every length from 0 to 300 (seeded;
// a random block passes the CRC once in 2^32), then frames each wrong in
// one field.
func TestDecoderDrops(t *testing.T) {
	var d Decoder
	var drops []Drop
	r := rand.New(rand.NewPCG(3, 3))
	for n := 0; n <= 300; n++ {
		b := make([]byte, n)
		for i := range b {
			b[i] = byte(1 + r.IntN(255))
		}
		if ss := d.Decode(nil, append(b, 0)); len(ss) != 0 {
			t.Fatalf("%d random bytes gave samples %v", n, shorts(ss))
		}
		drops = d.Drops(drops)
	}
	st := d.Stats()
	// And one of field "line" at every lineHint bytes in a row that made
	// no good frame: 45451 bytes.
	lines := 0
	for _, dr := range drops {
		if dr.Err.Field == "line" {
			lines++
		}
	}
	if uint64(len(drops)-lines) != st.Corrupted+st.Invalid || st.Corrupted != 300 || lines != (300*301/2+301)/lineHint {
		t.Fatalf("%d drops (%d of the line), stats %+v: want one per non-empty block", len(drops), lines, st)
	}
	for _, dr := range drops {
		if dr.Err.Field == "" || !errors.Is(dr.Err, ErrCorrupt) && !errors.Is(dr.Err, ErrInvalid) {
			t.Errorf("drop %v: no field or kind", dr.Err)
		}
	}

	badCRC := AppendRawFrame(nil, &Frame{Type: FrameWheels, Counter: 2, StampUs: 20, Counts: []int32{1}})
	badCRC[len(badCRC)-1] ^= 1
	nan := wheels(0, 3, 30, 1)
	nan.HasHeading, nan.HeadingRad = true, float32(math.NaN())
	typ := wheels(0, 4, 40, 1)
	typ.Type = 7
	stream := cat(encode(wheels(0, 1, 10, 0)), AppendCOBS(nil, badCRC), []byte{0}, encode(nan, typ),
		encode(wheels(0, 5, 5, 2), wheels(0, 6, 60, 2, 2), wheels(0, 7, 70, 3)), bytes.Repeat([]byte{9}, MaxEncodedLen+1), []byte{0})
	var fresh Decoder
	ss := fresh.Decode(nil, stream)
	var got []string
	for _, dr := range fresh.Drops(nil) {
		got = append(got, fmt.Sprintf("%v/%s", dr.Err.Kind, dr.Err.Field))
	}
	want := []string{"bridge: corrupted frame/crc", "bridge: invalid frame/heading", "bridge: invalid frame/type",
		"bridge: invalid frame/stamp", "bridge: invalid frame/wheels", "bridge: corrupted frame/length"}
	if strings.Join(got, ", ") != strings.Join(want, ", ") || len(ss) != 2 {
		t.Errorf("drops %q, want %q; %d samples, want 2", got, want, len(ss))
	}
	if more := fresh.Drops(nil); len(more) != 0 {
		t.Errorf("drops given twice: %v", more)
	}
}

// TestDecoderBehindRun: a controller that restarts without changing its
// boot byte sends frames whose counters are behind the last taken one; they
// are dropped as reordered until its counter passes the old one (at 100
// frames a second, 10000 frames behind take 100 s), and at every 100 in a
// row Drops says so, naming the boot byte. A few reordered frames among
// ones taken say nothing.
func TestDecoderBehindRun(t *testing.T) {
	var d Decoder
	var frames []Frame
	for k := range 10 {
		frames = append(frames, wheels(7, uint32(10_000+k), uint64(1_000_000+10_000*k), int32(k)))
	}
	frames = append(frames, wheels(7, 10_005, 1_050_000, 5), wheels(7, 10_010, 1_100_000, 10)) // reordered, then taken
	for k := range 250 {                                                                       // restarted: counter and clock from zero
		frames = append(frames, wheels(7, uint32(k), uint64(10_000*k), int32(k)))
	}
	ss := d.Decode(nil, encode(frames...))
	drops := d.Drops(nil)
	if len(ss) != 11 || len(drops) != 2 {
		t.Fatalf("%d samples, drops %v; want 11 samples and 2 drops", len(ss), drops)
	}
	for i, dr := range drops {
		want := fmt.Sprintf("bridge: frames behind: counter: %d frames in a row not ahead of the last taken frame's counter 10010", 100*(i+1))
		if !strings.HasPrefix(dr.Err.Error(), want) || !strings.Contains(dr.Err.Error(), "without changing its boot byte") {
			t.Errorf("drop %d: %v", i, dr.Err)
		}
	}
	if st := d.Stats(); st.Reordered != 251 || st.Duplicates != 0 {
		t.Errorf("stats %+v", st)
	}
}

// TestLineHintNotForValidCRC: frames with a good CRC that this decoder does
// not take (here an unknown type, as from firmware newer than the link)
// prove the bit rate right: each is named for what is wrong with it, and no
// run of them, however long, is said to make no good frame (field "line",
// which asks whether -baud is wrong). Before, the bytes of invalid frames
// counted toward it, so that every 4096 of them the link asked about the
// bit rate, wiring and ground of a line that worked.
func TestLineHintNotForValidCRC(t *testing.T) {
	var frames []Frame
	for k := range 400 {
		f := wheels(0, uint32(k+1), uint64(10*(k+1)), int32(k))
		f.Type = 7
		frames = append(frames, f)
	}
	stream := encode(frames...)
	if len(stream) < 2*lineHint {
		t.Fatalf("%d bytes, want over %d", len(stream), 2*lineHint)
	}
	var d Decoder
	var drops []Drop
	for i := 0; i < len(stream); i += 512 {
		d.Decode(nil, stream[i:min(i+512, len(stream))])
		drops = d.Drops(drops)
	}
	types := 0
	for _, dr := range drops {
		switch dr.Err.Field {
		case "line":
			t.Errorf("a line of good-CRC frames of an unknown type named as one that makes no good frame: %v", dr.Err)
		case "type":
			types++
		}
	}
	if st := d.Stats(); st.Invalid != 400 || types == 0 {
		t.Errorf("stats %+v, %d drops of field type; want 400 invalid, named by their type", st, types)
	}
}
