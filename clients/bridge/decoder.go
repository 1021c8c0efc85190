package bridge

import (
	"errors"
	"fmt"
	"slices"

	pb "reckon.example/proto/reckon/v1"
)

// Stats counts what a Decoder saw. Every frame that arrives whole ends in
// exactly one of Samples, Duplicates, Reordered and Invalid, or is Held
// until it does; a damaged one ends in Corrupted.
type Stats struct {
	// Frames is the number of frames with a good length and CRC.
	Frames uint64
	// Corrupted is the number of frames dropped for a wrong CRC or length,
	// malformed COBS, or more than MaxEncodedLen bytes between delimiters.
	// Bytes received before the first delimiter (joining a stream in the
	// middle of a frame) usually count here once.
	Corrupted uint64
	// Invalid is the number of frames with a good CRC that this decoder
	// does not take: unknown type or flags, a stamp past MaxStampUs or a
	// heading that is not finite, or, within one boot, a wheel count that
	// differs from the earlier frames' or a stamp not after the last taken
	// frame's although its counter is ahead, or one more than maxStepUs a
	// counter step after it (even when the next frame confirms the jump:
	// that one is taken); or a frame held at the start of a boot that no
	// later frame confirmed (Sequencer, "Start").
	Invalid uint64
	// Duplicates is the number of frames dropped because a frame with the
	// same counter was taken (or is held).
	Duplicates uint64
	// Reordered is the number of frames dropped because a newer one was
	// taken (or is held) already, or because they come from the boot
	// before the current one (Sequencer, "Restarts"); the newer frame's
	// cumulative counts cover theirs.
	Reordered uint64
	// Skipped is the number of counter values jumped over when a frame
	// was taken that no frame counted above had: frames lost, or arriving
	// later and then Reordered (or Invalid before their counter is read:
	// an unknown type or flags, a bad length). A frame of the boot dropped
	// as Invalid in between is not counted again here (up to maxDrops of
	// them between two frames taken).
	Skipped uint64
	// Restarts is the number of times the boot byte changed (or the first
	// frame showed a restart to Decoder.Resume): each begins a new run.
	Restarts uint64
	// Samples is the number of samples produced.
	Samples uint64
	// Held is the number of frames held now, not yet confirmed or dropped
	// (Sequencer, "Start" and "Restarts"); the link's end leaves them
	// unsent.
	Held uint64
}

// Splitter cuts a byte stream into frames at 0x00 delimiters, undoes the
// COBS stuffing and checks each frame's length and CRC. Empty frames
// (consecutive delimiters) are ignored, so that a sender may start every
// frame with a delimiter as well as end it. The zero value is ready.
type Splitter struct {
	buf       []byte // the encoded bytes of the frame being received
	raw       []byte // scratch for the decoded frame
	overlong  bool   // the frame being received passed MaxEncodedLen
	frames    uint64
	corrupted uint64
	invalid   uint64
	drops     []Drop // those of the last AppendFrames call, at most maxDrops
	base, n   int    // len(dst) when AppendFrames was called, and now
	// since is how many bytes arrived since the last frame with a good
	// CRC ended, taken or invalid (or the start); at every lineHint of
	// them a drop of field "line" says that none makes a frame.
	since int
}

// lineHint is how many bytes in a row that make no good frame make a
// Splitter say so (and again at every further lineHint): a controller
// sends a good frame every 26 to 58 bytes; bytes read at another bit rate
// than they were sent at make corrupted frames, or no delimiter at all
// and so no frame to count.
const lineHint = 4 << 10

// Drop is a frame dropped as corrupted or invalid, and why; or, of Kind
// ErrBehind, a long run of frames dropped as duplicates or reordered; or,
// of Kind ErrCorrupt and Field "line", every lineHint bytes in a row that
// made no good frame (read at another bit rate than the controller sends
// at, they make corrupted frames, or no delimiter and so no frame at all).
type Drop struct {
	// Err is a *FrameError naming the field that was wrong.
	Err *FrameError
	at  int // the Splitter's: how many frames of its call came before it
}

// maxDrops bounds the drops a Decoder keeps until Drops takes them; the
// ones past it are only counted in Stats.
const maxDrops = 64

func (s *Splitter) drop(err error) {
	var fe *FrameError
	if !errors.As(err, &fe) {
		fe = &FrameError{Kind: ErrCorrupt, Field: "stuffing", Detail: err.Error()}
	}
	if len(s.drops) < maxDrops {
		s.drops = append(s.drops, Drop{Err: fe, at: s.n - s.base})
	}
}

// AppendFrames appends to dst every frame that ends in p (the bytes of p
// after its last delimiter are kept for the next call) and returns dst.
// Each appended frame has its own Counts slice.
func (s *Splitter) AppendFrames(dst []Frame, p []byte) []Frame {
	s.drops, s.base = s.drops[:0], len(dst)
	for len(p) > 0 {
		s.n = len(dst)
		i := 0
		for i < len(p) && p[i] != 0 {
			i++
		}
		n := min(i+1, len(p)) // the bytes up to the delimiter and it
		if (s.since+n)/lineHint > s.since/lineHint {
			s.drop(frameErr(ErrCorrupt, "line", "%d bytes in a row make no good frame: over a serial port, is -baud the controller's bit rate, TX and RX crossed and ground shared? (PROTOCOL.md, \"Wiring\")", (s.since+n)/lineHint*lineHint))
		}
		s.since += n
		if !s.overlong {
			if len(s.buf)+i > MaxEncodedLen {
				s.overlong, s.buf = true, s.buf[:0]
			} else {
				s.buf = append(s.buf, p[:i]...)
			}
		}
		if i == len(p) {
			break
		}
		p = p[i+1:]
		if f, ok := s.end(); ok {
			dst = append(dst, f)
		}
	}
	return dst
}

// end finishes the frame in s.buf at a delimiter.
func (s *Splitter) end() (Frame, bool) {
	defer func() { s.buf, s.overlong = s.buf[:0], false }()
	if s.overlong {
		s.corrupted++
		s.drop(frameErr(ErrCorrupt, "length", "more than %d bytes before a 0x00 delimiter", MaxEncodedLen))
		return Frame{}, false
	}
	if len(s.buf) == 0 {
		return Frame{}, false
	}
	var err error
	s.raw, err = AppendUnCOBS(s.raw[:0], s.buf)
	var f Frame
	if err != nil {
		err = frameErr(ErrCorrupt, "stuffing", "malformed COBS: a code byte points past the frame's end")
	} else {
		err = ParseFrame(&f, s.raw)
	}
	switch {
	case err == nil:
		s.frames++
		s.since = 0
		return f, true
	case errors.Is(err, ErrInvalid):
		// A good CRC: the bit rate is right, whatever else is wrong.
		s.frames++
		s.invalid++
		s.since = 0
	default:
		s.corrupted++
	}
	s.drop(err)
	return Frame{}, false
}

// behindLimit is how many frames of the current boot in a row dropped as
// duplicates or reordered make a Sequencer say so (and again at every
// further behindLimit): a link reorders a few frames, not a second's worth;
// a controller that restarted without changing its boot byte sends
// nothing but such frames until its counter passes the old one.
const behindLimit = 100

// maxStepUs bounds how far, per counter step, a frame's stamp may run
// ahead of the last taken frame's (60 s): a controller sends frames many
// times a second, and one stamped over a minute a frame later is more
// likely a glitch of its clock (a 32-bit timer extended in firmware with
// a race between its halves puts one frame 2^32 us, 71.6 min, ahead) than
// a controller that sent nothing for that long. Such a frame is dropped
// as invalid, and the frame after it taken if it confirms the jump: taken,
// a glitch would put the robot's clock out of reach of every frame after
// it. The
// same bound confirms the first frame of a boot (Sequencer, "Start").
const maxStepUs = 60_000_000

// lateUs is the longest a datagram is taken to arrive late (2 s; a link
// reorders frames by milliseconds). A frame of the previous boot sent
// before the current boot started and arriving after a frame of the
// current boot stamped S (microseconds since that boot) is at least S
// late, so while the current boot's newest stamp is under lateUs a frame of
// the previous boot's byte may be a late one (Sequencer, "Restarts").
const lateUs = 2_000_000

// maxHeld bounds the frames a Sequencer holds until they are confirmed:
// past it the oldest is dropped (Sequencer, "Start"), or, of frames held
// as possibly late ones, the one after the first (Sequencer, "Restarts").
const maxHeld = 1024

// Sequencer turns frames, in arrival order, into odometry samples on the
// robot's time base, dropping duplicated and out-of-order frames. The zero
// value is ready.
//
// # Invariants
//
// The samples it produces within one boot have strictly increasing frame
// counters and strictly increasing stamps, so the service never sees time
// go backwards because of the link (it refuses odometry stamped at or
// before its newest). A frame is taken when its counter is
// ahead of the last taken one's in serial number arithmetic (RFC 1982):
// (Counter - last) as a signed 32-bit integer is positive.
//
// # Time base
//
// The controller's clock is the robot's time base: StampNs = StampUs x
// 1000, microseconds since the controller booted. The 64-bit stamp never
// wraps, so the time base does not depend on when the bridge started.
// Counts are unwrapped from int32 to int64 by adding each taken frame's
// difference (Counts[i] - last) modulo 2^32, so a counter of any width up
// to 32 bits, sent zero- or sign-extended, keeps its value modulo 2^32 and
// the service's counter_bits applies (32 for counts that use the whole
// int32, as a bridge restarted mid-run starts again from the raw value).
//
// # Start
//
// The first frame of a boot (the link's first, or the first of another
// boot byte) is the reference of every later one: taken with a glitched
// stamp (2^32 us ahead, or far behind), it would make every good frame
// after it invalid, or a jump. So it is held, not taken, until a later
// frame of its boot follows it: its counter ahead, its stamp after it by
// at most maxStepUs a counter step (the rule that confirms a jump). Then
// the boot starts at the earliest held frame some later frame follows:
// the held frames before it are dropped as invalid, and those after it
// and the confirming frame are taken as usual, so a normal start loses no
// frame. Frames not ahead of the last held one are dropped as duplicates
// or reordered. A frame that no later frame of its boot follows is never
// taken: held while no frame of another boot arrives and the current boot's
// clock runs on less than lateUs, then dropped as invalid (at most
// maxHeld are held; past that the oldest is dropped).
//
// # Restarts
//
// A frame with another Boot byte starts afresh once confirmed: counters,
// clock and counts begin again from the boot's first frame, and its sample
// carries the rebooted controller's stamp, which is usually far behind the
// last one. Take puts a run start (boot id BootID of the new byte) before
// that sample, so that the service begins a new run of the robot instead
// of refusing the new clock (DEVELOPERS.md, "Design: Runs").
//
// The previous boot's byte is remembered. Its frames are late ones from
// before the reboot, or a controller that booted again and drew that byte
// once more (one that toggles between two bytes). A late frame was sent
// before the current boot started, so one arriving after a frame of the
// current boot stamped S is at least S late: once the current boot's
// newest stamp reaches lateUs, a frame of the previous byte is a new boot
// and held as any other. Before that, its frames are held as long as each
// follows the one before, until they span lateUs less that newest stamp on
// their own clock (late frames sent within the last lateUs - S before the
// current boot began span less): then they are a new boot, and every one
// held is taken, none lost (past maxHeld, the one after the first is
// dropped as reordered: the first is the reference of the boot's counts,
// and the newer ones cover the dropped one's, so no travel is lost). Held
// frames of the previous byte that do not get there (the current boot's
// newest stamp reaches lateUs, a frame of another byte comes, or one of
// theirs breaks their order) are dropped as reordered, however many: late
// frames (less than lateUs late) never start a run again.
type Sequencer struct {
	started    bool
	boot       uint8
	retired    bool // whether old holds a previous boot's byte
	old        uint8
	counter    uint32
	stampUs    uint64
	counts     []int32 // the last taken frame's counts
	cumulative []int64
	stats      Stats
	// errs says why frames were dropped as invalid, or that a run of them
	// is behind, in order, until the Decoder takes them.
	errs   []*FrameError
	behind int // frames of this boot dropped in a row as duplicates or reordered
	// jumped: the last frame dropped for a stamp too far ahead
	// (maxStepUs), jumpCounter and jumpUs its counter and stamp; a frame
	// that follows it within maxStepUs a step confirms the jump.
	jumped      bool
	jumpCounter uint32
	jumpUs      uint64
	// invalidAhead holds the counters of the frames of this boot dropped
	// as invalid since the last taken one, ahead of it (at most maxDrops):
	// they arrived, so a frame taken past them does not count them as
	// skipped.
	invalidAhead []uint32
	// held: frames of boot heldBoot not yet taken, in counter order (Start);
	// heldLate: of the previous boot's byte while they may be late ones,
	// the first stamped heldFromUs (Restarts); heldAtUs: the current boot's
	// newest stamp when the first was held.
	held       []Frame
	heldBoot   uint8
	heldLate   bool
	heldFromUs uint64
	heldAtUs   uint64
	// merged: how many frames held as late ones were dropped past
	// maxHeld between the first held and the newest (Restarts).
	merged uint64
	// resumed: the robot's current run is of boot byte resumedBoot
	// (Decoder.Resume), compared with the first frame's.
	resumed     bool
	resumedBoot uint8
	// resumedNs: the robot's newest odometry (0: none); a first frame
	// stamped at or before it is of a controller that restarted
	// (Decoder.Resume).
	resumedNs int64
}

// Take appends to dst the samples that f makes: none when f is dropped or
// held; when f confirms a boot, a run start if it is a restart, then the
// samples of the held frames taken and of f.
func (s *Sequencer) Take(dst []*pb.Sample, f *Frame) []*pb.Sample {
	if s.started && f.Boot == s.boot {
		n := len(dst)
		dst = s.next(dst, f)
		if len(dst) > n && len(s.held) > 0 && (s.heldLate && s.stampUs >= lateUs || s.stampUs-s.heldAtUs >= lateUs) {
			s.dropHeld()
		}
		return dst
	}
	late := s.started && s.retired && f.Boot == s.old && s.stampUs < lateUs
	if len(s.held) > 0 && (f.Boot != s.heldBoot || s.heldLate && !late) {
		s.dropHeld()
	}
	if len(s.held) == 0 {
		s.heldBoot, s.heldLate, s.heldFromUs, s.heldAtUs = f.Boot, late, f.StampUs, s.stampUs
		s.held = append(s.held, cloneFrame(f))
		return dst
	}
	if s.heldLate {
		return s.holdLate(dst, f)
	}
	return s.hold(dst, f)
}

// hold takes f, of the boot of the held frames, as Start says.
func (s *Sequencer) hold(dst []*pb.Sample, f *Frame) []*pb.Sample {
	if int32(f.Counter-s.held[len(s.held)-1].Counter) <= 0 {
		for i := range s.held {
			if s.held[i].Counter == f.Counter {
				s.stats.Duplicates++
				return dst
			}
		}
		s.stats.Reordered++
		return dst
	}
	for i := range s.held {
		if follows(s.held[i].Counter, s.held[i].StampUs, len(s.held[i].Counts), f) {
			held := s.held
			for j := range held[:i] {
				g := &held[j]
				s.dropInvalid(frameErr(ErrInvalid, "stamp", "%d us (counter %d) at the start of boot %d: no later frame follows it, frame %d at %d us follows a later one (a glitch of the controller's clock?)",
					g.StampUs, g.Counter, g.Boot, f.Counter, f.StampUs))
			}
			dst = s.start(dst, &held[i])
			for j := i + 1; j < len(held); j++ {
				dst = s.next(dst, &held[j])
			}
			s.held = held[:0]
			return s.next(dst, f)
		}
	}
	s.held = append(s.held, cloneFrame(f))
	if len(s.held) > maxHeld {
		g := &s.held[0]
		s.dropInvalid(frameErr(ErrInvalid, "stamp", "%d us (counter %d) at the start of boot %d: none of the %d frames after it follows it", g.StampUs, g.Counter, g.Boot, maxHeld))
		s.held = append(s.held[:0], s.held[1:]...)
	}
	return dst
}

// holdLate takes f, of the previous boot's byte like the held frames, while
// they may be late ones (Restarts).
func (s *Sequencer) holdLate(dst []*pb.Sample, f *Frame) []*pb.Sample {
	last := &s.held[len(s.held)-1]
	switch {
	case f.Counter == last.Counter:
		s.stats.Duplicates++
		return dst
	case int32(f.Counter-last.Counter) < 0:
		s.stats.Reordered++
		return dst
	case !follows(last.Counter, last.StampUs, len(last.Counts), f):
		s.dropHeld()
		s.heldBoot, s.heldLate, s.heldFromUs, s.heldAtUs = f.Boot, true, f.StampUs, s.stampUs
		s.held = append(s.held, cloneFrame(f))
		return dst
	}
	s.held = append(s.held, cloneFrame(f))
	if f.StampUs-s.heldFromUs >= lateUs-s.heldAtUs {
		held := s.held
		dst = s.start(dst, &held[0])
		for j := 1; j < len(held); j++ {
			dst = s.next(dst, &held[j])
		}
		// The frames merged away arrived: not skipped.
		s.stats.Skipped -= s.merged
		s.held, s.merged = held[:0], 0
		return dst
	}
	if len(s.held) > maxHeld {
		// The first held frame is the reference of the boot's counts;
		// the one after it is dropped, its counts covered by the newer
		// ones: a boot taken loses no travel, only a sample.
		s.stats.Reordered++
		s.merged++
		s.held = append(s.held[:1], s.held[2:]...)
	}
	return dst
}

// dropHeld drops the held frames: as reordered if they may be late frames
// of the previous boot, otherwise as invalid.
func (s *Sequencer) dropHeld() {
	for i := range s.held {
		g := &s.held[i]
		if s.heldLate {
			s.stats.Reordered++
			continue
		}
		s.dropInvalid(frameErr(ErrInvalid, "boot", "%d: no later frame of that boot followed the frame with counter %d, stamp %d us (a frame of another boot came, or boot %d's clock ran on %d s)",
			g.Boot, g.Counter, g.StampUs, s.boot, lateUs/1_000_000))
	}
	s.held, s.merged = s.held[:0], 0
}

// follows reports whether f follows a frame of its boot with counter c,
// stamp us and n wheels: f's counter is ahead, its wheels as many, and its
// stamp after it by at most maxStepUs a counter step.
func follows(c uint32, us uint64, n int, f *Frame) bool {
	ahead := int32(f.Counter - c)
	return ahead > 0 && len(f.Counts) == n && f.StampUs > us && f.StampUs-us <= uint64(ahead)*maxStepUs
}

func cloneFrame(f *Frame) Frame {
	g := *f
	g.Counts = append([]int32(nil), f.Counts...)
	return g
}

// start begins a boot at f, confirmed (Start), and appends its sample,
// after a run start if it is a restart.
func (s *Sequencer) start(dst []*pb.Sample, f *Frame) []*pb.Sample {
	restart := s.started || s.resumed && f.Boot != s.resumedBoot || s.resumedNs > 0 && int64(f.StampUs)*1000 <= s.resumedNs
	if s.started {
		s.retired, s.old = true, s.boot
	}
	if restart {
		s.stats.Restarts++
		dst = append(dst, &pb.Sample{Sample: &pb.Sample_RunStart{RunStart: &pb.RunStart{BootId: BootID(f.Boot)}}})
	}
	s.started, s.boot, s.counter, s.stampUs, s.behind, s.jumped = true, f.Boot, f.Counter, f.StampUs, 0, false
	s.invalidAhead = s.invalidAhead[:0]
	s.counts = append(s.counts[:0], f.Counts...)
	s.cumulative = s.cumulative[:0]
	for _, c := range f.Counts {
		s.cumulative = append(s.cumulative, int64(c))
	}
	return append(dst, s.sample(f))
}

// dropInvalid counts a frame dropped as invalid, for err.
func (s *Sequencer) dropInvalid(err *FrameError) {
	s.stats.Invalid++
	s.errs = append(s.errs, err)
}

// next takes f, of the current boot, after the boot's first frame.
func (s *Sequencer) next(dst []*pb.Sample, f *Frame) []*pb.Sample {
	ahead := int32(f.Counter - s.counter)
	if ahead <= 0 {
		if ahead == 0 {
			s.stats.Duplicates++
		} else {
			s.stats.Reordered++
		}
		if s.behind++; s.behind%behindLimit == 0 {
			s.errs = append(s.errs, frameErr(ErrBehind, "counter", "%d frames in a row not ahead of the last taken frame's counter %d (the latest: counter %d, stamp %d us); did the controller restart without changing its boot byte? (PROTOCOL.md, \"Reboots\")",
				s.behind, s.counter, f.Counter, f.StampUs))
		}
		return dst
	}
	var invalid *FrameError
	switch {
	case len(f.Counts) != len(s.counts):
		invalid = frameErr(ErrInvalid, "wheels", "%d, the earlier frames of boot %d had %d", len(f.Counts), s.boot, len(s.counts))
	case f.StampUs <= s.stampUs:
		invalid = frameErr(ErrInvalid, "stamp", "%d us is not after the last taken frame's %d us although its counter %d is ahead of %d (the controller's clock must not go back within a boot)",
			f.StampUs, s.stampUs, f.Counter, s.counter)
	case f.StampUs-s.stampUs > uint64(ahead)*maxStepUs && !(s.jumped && follows(s.jumpCounter, s.jumpUs, len(s.counts), f)):
		s.jumped, s.jumpCounter, s.jumpUs = true, f.Counter, f.StampUs
		invalid = frameErr(ErrInvalid, "stamp", "%d us is %.0f s after the last taken frame's %d us, its counter %d ahead (more than %d s a counter step: a glitch of the controller's clock? the next frame is taken if it follows this one)",
			f.StampUs, float64(f.StampUs-s.stampUs)*1e-6, s.stampUs, ahead, maxStepUs/1_000_000)
	}
	if invalid != nil {
		s.dropInvalid(invalid)
		if len(s.invalidAhead) < maxDrops && !slices.Contains(s.invalidAhead, f.Counter) {
			s.invalidAhead = append(s.invalidAhead, f.Counter)
		}
		return dst
	}
	// The counter values between the last taken frame and f, less those of
	// frames that arrived and were dropped as invalid: those are counted
	// once, as invalid.
	skipped := uint64(ahead - 1)
	keep := s.invalidAhead[:0]
	for _, c := range s.invalidAhead {
		switch d := int32(c - s.counter); {
		case d < ahead:
			skipped--
		case d > ahead:
			keep = append(keep, c)
		}
	}
	s.invalidAhead = keep
	s.behind, s.jumped = 0, false
	s.stats.Skipped += skipped
	s.counter, s.stampUs = f.Counter, f.StampUs
	for i, c := range f.Counts {
		s.cumulative[i] += int64(c - s.counts[i])
		s.counts[i] = c
	}
	return append(dst, s.sample(f))
}

func (s *Sequencer) sample(f *Frame) *pb.Sample {
	s.stats.Samples++
	o := &pb.OdometrySample{
		StampNs: int64(s.stampUs) * 1000,
		Motion:  &pb.OdometrySample_Counts{Counts: &pb.WheelCounts{Counts: append([]int64(nil), s.cumulative...)}},
	}
	if f.HasHeading {
		h := float64(f.HeadingRad)
		o.ImuHeadingRad = &h
	}
	return &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: o}}
}

// Decoder is a Splitter followed by a Sequencer: bytes from a serial port
// or UDP datagrams in, odometry samples out. It does no I/O and keeps no
// clock; the same bytes always give the same samples. The zero value is
// ready. A Decoder is not safe for concurrent use.
type Decoder struct {
	split  Splitter
	seq    Sequencer
	frames []Frame
	drops  []Drop // in arrival order, until Drops takes them; at most maxDrops
}

func (d *Decoder) drop(dr Drop) {
	if len(d.drops) < maxDrops {
		d.drops = append(d.drops, dr)
	}
}

// Decode appends to dst the samples of the frames that end in p and
// returns dst: odometry, and a run start before the first sample of a
// controller that restarted. Bytes after p's last delimiter wait for the
// next call.
func (d *Decoder) Decode(dst []*pb.Sample, p []byte) []*pb.Sample {
	d.frames = d.split.AppendFrames(d.frames[:0], p)
	split := d.split.drops // the frames the splitter dropped, among d.frames
	j := 0
	for i := range d.frames {
		for ; j < len(split) && split[j].at <= i; j++ {
			d.drop(split[j])
		}
		dst = d.seq.Take(dst, &d.frames[i])
		for _, err := range d.seq.errs {
			d.drop(Drop{Err: err})
		}
		d.seq.errs = d.seq.errs[:0]
	}
	for ; j < len(split); j++ {
		d.drop(split[j])
	}
	return dst
}

// BootID is the run start's boot id for a controller boot byte:
// "link-boot-{byte, two hex digits}". It differs from the current run's
// whenever the byte does, which is what a restart is.
func BootID(boot uint8) string { return fmt.Sprintf("link-boot-%02x", boot) }

// Resume tells the decoder the boot id of the robot's current run
// (Robot.boot_id) and its newest odometry stamp (Robot.newest_stamp_ns),
// so that it begins a new run at its first frame if the controller
// restarted while no bridge was listening. When the run's boot id is a
// link boot id, a first frame of another boot byte says so. So does,
// whatever the run's boot id, a first frame stamped at or before the
// newest odometry: the controller's clock started again (with the same
// byte: it booted twice, toggling a bit back), and the service would
// refuse its odometry as time going backwards; a controller that ran on
// stamps after it. Call it before Decode.
func (d *Decoder) Resume(bootID string, newestNs int64) {
	var b uint8
	if _, err := fmt.Sscanf(bootID, "link-boot-%02x", &b); err == nil && bootID == BootID(b) {
		d.seq.resumed, d.seq.resumedBoot = true, b
	}
	d.seq.resumedNs = newestNs
}

// Drops appends to dst the frames dropped as corrupted or invalid since
// the last call, with why (at most 64 of them; the counts in Stats are
// complete), and returns dst.
func (d *Decoder) Drops(dst []Drop) []Drop {
	dst = append(dst, d.drops...)
	d.drops = d.drops[:0]
	return dst
}

// Stats returns the counts so far.
func (d *Decoder) Stats() Stats {
	st := d.seq.stats
	st.Frames, st.Corrupted, st.Invalid = d.split.frames, d.split.corrupted, d.split.invalid+st.Invalid
	st.Held = uint64(len(d.seq.held))
	return st
}
