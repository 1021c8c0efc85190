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
			[]sampleOf{{5_000_000, []int64{0}, -100}, {6_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1}},
		// The service refuses odometry not after the newest (time_backwards):
		// a frame read within the same microsecond is the link's to drop,
		// its counts carried by the next frame.
		{"same stamp with counter ahead", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 5000, 1), wheels(0, 3, 6000, 2)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {6_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1}},
		// A firmware that extends a 32-bit microsecond timer and reads its
		// two halves without care puts one frame 2^32 us (71.6 min) ahead
		// (PROTOCOL.md, "Stamps"). Taken, it would send the service a
		// sample over an hour ahead and drop every later frame as behind it.
		// The frame dropped counts once, as invalid: it arrived, so its
		// counter is not skipped (before, it counted under both).
		{"one stamp jumps 2^32 us ahead", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 5000+10000+1<<32, 1), wheels(0, 3, 25000, 2), wheels(0, 4, 35000, 3)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {25_000_000, []int64{2}, -100}, {35_000_000, []int64{3}, -100}}, Stats{Samples: 3, Invalid: 1}},
		// A controller that really sent nothing for two hours (held in a
		// debugger): the frame after the jump confirms it and is taken.
		{"a jump confirmed by the next frame", []Frame{wheels(0, 0, 4000, 0), wheels(0, 1, 5000, 0), wheels(0, 2, 7_200_005_000, 1), wheels(0, 3, 7_200_015_000, 2)},
			[]sampleOf{{4_000_000, []int64{0}, -100}, {5_000_000, []int64{0}, -100}, {7_200_015_000_000, []int64{2}, -100}}, Stats{Samples: 3, Invalid: 1}},
		// The same glitch in the link's very first frame: held until a
		// later frame follows it, it is dropped, and the frames after it
		// are taken. Before, it was the reference: every later frame was
		// dropped as behind it.
		{"first frame 2^32 us ahead", []Frame{wheels(0, 1, 5000+1<<32, 0), wheels(0, 2, 15000, 1), wheels(0, 3, 25000, 2), wheels(0, 4, 35000, 3)},
			[]sampleOf{{15_000_000, []int64{1}, -100}, {25_000_000, []int64{2}, -100}, {35_000_000, []int64{3}, -100}}, Stats{Samples: 3, Invalid: 1}},
		// A first frame far behind the ones that follow: before, it was
		// taken, the robot's clock two hours behind its controller's.
		{"first frame far behind", []Frame{wheels(0, 1, 1000, 0), wheels(0, 2, 7_200_005_000, 1), wheels(0, 3, 7_200_015_000, 2)},
			[]sampleOf{{7_200_005_000_000, []int64{1}, -100}, {7_200_015_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1}},
		// The first frame good and the second glitched: the third follows
		// the first, which is taken, and the second is a jump.
		{"second frame 2^32 us ahead", []Frame{wheels(0, 1, 5000, 0), wheels(0, 2, 15000+1<<32, 1), wheels(0, 3, 25000, 2)},
			[]sampleOf{{5_000_000, []int64{0}, -100}, {25_000_000, []int64{2}, -100}}, Stats{Samples: 2, Invalid: 1}},
		// The first frame of a new boot glitched alike: the run starts at
		// the boot's first good frame.
		{"restart, its first frame 2^32 us ahead", []Frame{wheels(4, 900, 9000, 50), wheels(4, 901, 10000, 51), wheels(5, 0, 30+1<<32, 0), wheels(5, 1, 40, 2), wheels(5, 2, 50, 3)},
			[]sampleOf{{9_000_000, []int64{50}, -100}, {10_000_000, []int64{51}, -100}, {40_000, []int64{2}, -100}, {50_000, []int64{3}, -100}},
			Stats{Samples: 4, Restarts: 1, Invalid: 1}},
		// A lone frame is held, not taken: nothing confirms it yet.
		{"a lone first frame", []Frame{wheels(0, 1, 5000, 0)}, nil, Stats{}},
		{"frame counter wraps", []Frame{wheels(0, 1<<32-1, 10, 0), wheels(0, 0, 20, 1), wheels(0, 1<<32-1, 10, 0)},
			[]sampleOf{{10_000, []int64{0}, -100}, {20_000, []int64{1}, -100}}, Stats{Samples: 2, Reordered: 1}},
		{"int32 counts unwrap", []Frame{wheels(0, 1, 10, 2147483000, -2147483000), wheels(0, 2, 20, -2147483000, 2147483000)},
			[]sampleOf{{10_000, []int64{2147483000, -2147483000}, -100}, {20_000, []int64{2147484296, -2147484296}, -100}}, Stats{Samples: 2}},
		{"wheel count changes", []Frame{wheels(0, 1, 10, 1, 2), wheels(0, 2, 20, 1), wheels(0, 3, 30, 3, 4)},
			[]sampleOf{{10_000, []int64{1, 2}, -100}, {30_000, []int64{3, 4}, -100}}, Stats{Samples: 2, Invalid: 1}},
		{"restart, late frame of the old boot dropped", []Frame{wheels(4, 900, 9000, 50), wheels(4, 901, 10000, 51), wheels(5, 0, 30, 0), wheels(4, 899, 8000, 40), wheels(5, 1, 40, 2)},
			[]sampleOf{{9_000_000, []int64{50}, -100}, {10_000_000, []int64{51}, -100}, {30_000, []int64{0}, -100}, {40_000, []int64{2}, -100}},
			Stats{Samples: 4, Restarts: 1, Reordered: 1}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var s Sequencer
			var got []*pb.Sample
			for i := range c.frames {
				got = s.Take(got, &c.frames[i])
			}
			if !sameSamples(shorts(odometry(got)), c.want) {
				t.Errorf("samples\n got %v\nwant %v", shorts(odometry(got)), c.want)
			}
			if s.stats != c.stats {
				t.Errorf("stats %+v, want %+v", s.stats, c.stats)
			}
		})
	}
}

// odometry is ss without its run starts.
func odometry(ss []*pb.Sample) []*pb.Sample {
	var out []*pb.Sample
	for _, s := range ss {
		if s.GetOdometry() != nil {
			out = append(out, s)
		}
	}
	return out
}

// boots returns frames of a controller that boots with each byte of bytes
// in turn, running each boot for the matching number of frames, 10 ms
// apart, its clock from 50 ms at its first frame and its counter from 0.
func boots(bytes []uint8, frames []int) []Frame {
	var out []Frame
	for i, b := range bytes {
		for k := range frames[i] {
			out = append(out, wheels(b, uint32(k), uint64(50_000+10_000*k), int32(3*k+i)))
		}
	}
	return out
}

// runStarts lists the boot ids of the run starts in ss.
func runStarts(ss []*pb.Sample) []string {
	var out []string
	for _, s := range ss {
		if rs := s.GetRunStart(); rs != nil {
			out = append(out, rs.GetBootId())
		}
	}
	return out
}

// TestBootToggle: a controller that toggles its boot byte between two
// values (a single bit in EEPROM) reboots to the byte before the last at
// every second boot. Each reboot starts a run and every frame of every
// boot is taken, also when the boot in between ran only half a second
// (then the new boot's frames are held until they span 2 s less its last
// stamp, lateUs, and then taken). Before, the first 16 frames of every
// such boot were dropped as late frames of the old one (staleBootLimit).
func TestBootToggle(t *testing.T) {
	for _, c := range []struct {
		name   string
		frames []int
	}{
		{"3 s boots", []int{300, 300, 300, 300}},
		{"a 0.5 s boot in between", []int{300, 50, 300, 50, 300}},
	} {
		t.Run(c.name, func(t *testing.T) {
			bytes := []uint8{1, 2, 1, 2, 1}[:len(c.frames)]
			var d Decoder
			ss := d.Decode(nil, encode(boots(bytes, c.frames)...))
			total := 0
			for _, n := range c.frames {
				total += n
			}
			want := []string{"link-boot-02", "link-boot-01", "link-boot-02", "link-boot-01"}[:len(c.frames)-1]
			if got := runStarts(ss); strings.Join(got, " ") != strings.Join(want, " ") || len(odometry(ss)) != total {
				t.Errorf("run starts %v, %d samples; want %v and all %d frames", got, len(odometry(ss)), want, total)
			}
			if st := d.Stats(); st.Samples != uint64(total) || st.Reordered+st.Invalid+st.Held != 0 || st.Restarts != uint64(len(want)) {
				t.Errorf("stats %+v", st)
			}
		})
	}
}

// TestLateFramesOfOldBoot: over UDP the last frames of a boot can arrive
// after the first frames of the next. 120 of them in a row (1.2 s of the
// old clock, arriving after the new boot's frame stamped 0.09 s) are
// dropped as reordered, however many: they never start a run of the old
// boot again, and every frame of the new boot is taken. Before, the 17th
// (staleBootLimit) started a run of the old boot, and the new boot's
// next frame another run.
func TestLateFramesOfOldBoot(t *testing.T) {
	old := boots([]uint8{1}, []int{300})
	cur := boots([]uint8{2}, []int{300})
	for i := range old {
		old[i].StampUs += 5_000_000 // the old boot ran 5 s before
	}
	frames := cat2(old[:180], cur[:5], old[180:], cur[5:])
	var d Decoder
	ss := d.Decode(nil, encode(frames...))
	if got := runStarts(ss); len(got) != 1 || got[0] != "link-boot-02" || len(odometry(ss)) != 480 {
		t.Errorf("run starts %v, %d samples; want one of link-boot-02 and 480 samples", got, len(odometry(ss)))
	}
	if st := d.Stats(); st.Reordered != 120 || st.Restarts != 1 || st.Held != 0 || st.Invalid != 0 {
		t.Errorf("stats %+v, want 120 reordered, 1 restart", st)
	}
	// Interleaved with the new boot's frames, the same.
	var mixed []Frame
	mixed = append(mixed, old[:180]...)
	mixed = append(mixed, cur[:5]...)
	for k := range 120 {
		mixed = append(mixed, old[180+k], cur[5+k])
	}
	mixed = append(mixed, cur[125:]...)
	var d2 Decoder
	ss = d2.Decode(nil, encode(mixed...))
	if got := runStarts(ss); len(got) != 1 || len(odometry(ss)) != 480 {
		t.Errorf("interleaved: run starts %v, %d samples", got, len(odometry(ss)))
	}
	if st := d2.Stats(); st.Reordered != 120 || st.Restarts != 1 || st.Held != 0 {
		t.Errorf("interleaved: stats %+v", st)
	}
}

// TestStrayBootDropped: a frame of another boot byte that no frame of its
// boot follows (a stray frame, another controller's) is held while the
// current boot's clock runs on less than 2 s (lateUs), then dropped as
// invalid naming its boot; it starts no run.
func TestStrayBootDropped(t *testing.T) {
	frames := boots([]uint8{4}, []int{400})
	frames = append(frames[:100:100], append([]Frame{wheels(9, 0, 30, 0)}, frames[100:]...)...)
	var d Decoder
	ss := d.Decode(nil, encode(frames[:250]...))
	if st := d.Stats(); st.Held != 1 || st.Invalid != 0 || len(ss) != 249 {
		t.Fatalf("after 1.5 s: stats %+v, %d samples; want the stray frame held", st, len(ss))
	}
	ss = d.Decode(ss, encode(frames[250:]...))
	drops := d.Drops(nil)
	if st := d.Stats(); st.Held != 0 || st.Invalid != 1 || st.Restarts != 0 || len(ss) != 400 || len(drops) != 1 || drops[0].Err.Field != "boot" {
		t.Errorf("stats %+v, %d samples, drops %v; want the stray frame dropped as invalid (boot)", st, len(ss), drops)
	}
}

func cat2(parts ...[]Frame) []Frame {
	var out []Frame
	for _, p := range parts {
		out = append(out, p...)
	}
	return out
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
		if st.Samples+st.Duplicates+st.Reordered+st.Invalid+st.Held != st.Frames {
			t.Fatalf("frames do not add up: %+v", st)
		}
	})
}

// TestDecoderRunStart: a controller restart (another boot byte) puts a run
// start naming the new boot before its first sample; a decoder resumed on
// a robot whose current run is of another boot starts a run at its first
// frame, and one resumed on the same boot does not, unless its stamp says
// otherwise; as on a run of no link boot, a first frame stamped at or
// before the robot's newest odometry is of a clock started again.
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
	got := kinds(d.Decode(nil, encode(wheels(4, 900, 9000, 50), wheels(4, 901, 10000, 51), wheels(5, 0, 30, 0), wheels(4, 899, 8000, 40), wheels(5, 1, 40, 2))))
	if want := "odo(9000000) odo(10000000) start(link-boot-05) odo(30000) odo(40000) "; got != want {
		t.Errorf("restart:\n got %s\nwant %s", got, want)
	}
	for _, c := range []struct {
		resume string
		newest int64 // the robot's newest odometry, ns
		want   string
	}{
		{"link-boot-04", 0, "start(link-boot-05) odo(30000) "},
		{"link-boot-04", 9_000_000, "start(link-boot-05) odo(30000) "},
		{"link-boot-05", 20_000, "odo(30000) "}, // the same boot, its clock ran on
		// The same byte, its clock started again: the controller booted
		// twice while no bridge listened, toggling a bit back (PROTOCOL.md,
		// "Reboots"). Before, no run started, and the service refused
		// every sample as time going backwards.
		{"link-boot-05", 9_000_000, "start(link-boot-05) odo(30000) "},
		{"link-boot-05", 30_000, "start(link-boot-05) odo(30000) "},
		{"", 0, "odo(30000) "},      // a new robot
		{"", 29_999, "odo(30000) "}, // the controller ran on
		{"", 30_000, "start(link-boot-05) odo(30000) "},
		{"", 9_000_000, "start(link-boot-05) odo(30000) "}, // its clock started again
		{"by-hand-1", 20_000, "odo(30000) "},
		{"by-hand-1", 9_000_000, "start(link-boot-05) odo(30000) "},
		{"link-boot-5", 9_000_000, "start(link-boot-05) odo(30000) "}, // not a link boot id: two hex digits
	} {
		var d Decoder
		d.Resume(c.resume, c.newest)
		if got := kinds(d.Decode(nil, encode(wheels(5, 0, 30, 0), wheels(5, 1, 40, 1)))); got != c.want+"odo(40000) " {
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
