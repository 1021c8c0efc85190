package bridge

import (
	"encoding/binary"
	"errors"
	"fmt"
	"math"
)

// FrameType says what a frame carries (byte 0 of the frame).
type FrameType uint8

// FrameWheels is the only frame type so far: cumulative wheel counts and an
// optional IMU heading.
const FrameWheels FrameType = 1

// Frame flag bits (byte 1 of the frame); the other bits must be zero.
const (
	// FlagHeading says the frame carries an IMU heading after the counts.
	FlagHeading uint8 = 1 << 0
)

// Sizes of a frame, bytes.
const (
	// MaxWheels is the most wheels a frame carries.
	MaxWheels = 8
	// HeaderLen is the fixed part before the counts.
	HeaderLen = 16
	// MaxFrameLen is the longest frame before COBS: header, MaxWheels
	// counts, heading and CRC.
	MaxFrameLen = HeaderLen + 4*MaxWheels + 4 + 4
	// MaxEncodedLen is the longest COBS-encoded frame, without its
	// delimiter (COBS adds one byte to a frame shorter than 254 bytes).
	MaxEncodedLen = MaxFrameLen + 1
)

// MaxStampUs is the largest stamp a frame may carry, microseconds (292
// years): its nanoseconds still fit an int64.
const MaxStampUs = math.MaxInt64 / 1000

// Errors of ParseFrame. ErrCorrupt covers what a damaged link produces (CRC
// mismatch, wrong length); ErrInvalid covers a frame that passed its CRC
// but that this decoder does not accept (an encoder bug or a newer
// protocol).
var (
	ErrCorrupt = errors.New("bridge: corrupted frame")
	ErrInvalid = errors.New("bridge: invalid frame")
	// ErrBehind is the Kind of a Drop that reports a long run of frames
	// that are not ahead of the last taken one (Decoder.Drops).
	ErrBehind = errors.New("bridge: frames behind")
)

// FrameError is why a frame was dropped: Kind is ErrCorrupt (damaged on
// the way) or ErrInvalid (a good CRC, but not a frame this decoder takes),
// Field the part of the frame that was wrong ("length", "crc",
// "stuffing", "type", "flags", "wheels", "stamp", "heading"; "boot" for a
// frame of another boot that no later frame of its boot confirmed; "line"
// for bytes that make no good frame, see Drop), and Detail
// its value and what was expected. errors.Is(err, ErrCorrupt) and
// errors.Is(err, ErrInvalid) tell the kinds apart.
type FrameError struct {
	Kind   error
	Field  string
	Detail string
}

func (e *FrameError) Error() string { return e.Kind.Error() + ": " + e.Field + ": " + e.Detail }

// Unwrap returns Kind.
func (e *FrameError) Unwrap() error { return e.Kind }

func frameErr(kind error, field, format string, args ...any) *FrameError {
	return &FrameError{Kind: kind, Field: field, Detail: fmt.Sprintf(format, args...)}
}

// Frame is one message of the reckon link protocol, as the controller
// built it. See the package documentation for the byte layout.
type Frame struct {
	// Type is the frame type; FrameWheels.
	Type FrameType
	// Boot identifies the controller's boot: it changes when the
	// controller restarts (and its counter, clock and counts with it).
	Boot uint8
	// Counter is incremented by one for every frame the controller sends,
	// wrapping at 2^32.
	Counter uint32
	// StampUs is the controller's clock when the wheels were read,
	// microseconds since it booted; at most MaxStampUs.
	StampUs uint64
	// Counts is each wheel's cumulative encoder count, in the order of the
	// robot's wheels (1 to MaxWheels entries).
	Counts []int32
	// HasHeading says whether HeadingRad is set.
	HasHeading bool
	// HeadingRad is the IMU heading, radians, counter-clockwise.
	HeadingRad float32
}

// AppendFrame appends f, with its CRC, COBS-encoded and followed by the
// 0x00 delimiter, to dst. scratch, if large enough (MaxFrameLen), is
// used to build the frame before encoding, so that AppendFrame allocates
// nothing when dst has room. It panics if f has no wheels or more than
// MaxWheels, which is a programming error.
func AppendFrame(dst []byte, f *Frame, scratch []byte) []byte {
	raw := AppendRawFrame(scratch[:0], f)
	dst = AppendCOBS(dst, raw)
	return append(dst, 0)
}

// AppendRawFrame appends f and its CRC, before COBS, to dst.
func AppendRawFrame(dst []byte, f *Frame) []byte {
	if len(f.Counts) == 0 || len(f.Counts) > MaxWheels {
		panic(fmt.Sprintf("bridge: frame with %d wheels (want 1 to %d)", len(f.Counts), MaxWheels))
	}
	start := len(dst)
	var flags uint8
	if f.HasHeading {
		flags |= FlagHeading
	}
	dst = append(dst, byte(f.Type), flags, f.Boot, byte(len(f.Counts)))
	dst = binary.LittleEndian.AppendUint32(dst, f.Counter)
	dst = binary.LittleEndian.AppendUint64(dst, f.StampUs)
	for _, c := range f.Counts {
		dst = binary.LittleEndian.AppendUint32(dst, uint32(c))
	}
	if f.HasHeading {
		dst = binary.LittleEndian.AppendUint32(dst, math.Float32bits(f.HeadingRad))
	}
	return binary.LittleEndian.AppendUint32(dst, Checksum(dst[start:]))
}

// ParseFrame reads raw, one frame after COBS decoding (CRC included), into
// f, reusing f.Counts. It returns an error wrapping ErrCorrupt when the
// length or the CRC is wrong, and ErrInvalid for a frame with a good CRC
// that is not a valid frame of this protocol: an unknown type, unknown
// flag bits, no wheels, a stamp past MaxStampUs, or a heading that is not
// finite.
func ParseFrame(f *Frame, raw []byte) error {
	if len(raw) < HeaderLen+4+4 || len(raw) > MaxFrameLen {
		return frameErr(ErrCorrupt, "length", "%d bytes, a frame has %d to %d", len(raw), HeaderLen+4+4, MaxFrameLen)
	}
	body := raw[:len(raw)-4]
	if got, want := binary.LittleEndian.Uint32(raw[len(body):]), Checksum(body); got != want {
		return frameErr(ErrCorrupt, "crc", "CRC %08x, computed %08x", got, want)
	}
	typ, flags, n := FrameType(body[0]), body[1], int(body[3])
	want := HeaderLen + 4*n
	if flags&FlagHeading != 0 {
		want += 4
	}
	switch {
	case typ != FrameWheels:
		return frameErr(ErrInvalid, "type", "%d, only %d (wheel counts) is known", typ, FrameWheels)
	case flags&^FlagHeading != 0:
		return frameErr(ErrInvalid, "flags", "%02x, only bit 0 (heading) is defined", flags)
	case n == 0 || n > MaxWheels:
		return frameErr(ErrInvalid, "wheels", "%d, want 1 to %d", n, MaxWheels)
	case len(body) != want:
		return frameErr(ErrInvalid, "length", "%d bytes for %d wheels (flags %02x), want %d", len(body)+4, n, flags, want+4)
	case binary.LittleEndian.Uint64(body[8:]) > MaxStampUs:
		return frameErr(ErrInvalid, "stamp", "%d us, past the largest %d us", binary.LittleEndian.Uint64(body[8:]), uint64(MaxStampUs))
	}
	f.Type, f.Boot = typ, body[2]
	f.Counter = binary.LittleEndian.Uint32(body[4:])
	f.StampUs = binary.LittleEndian.Uint64(body[8:])
	f.Counts = f.Counts[:0]
	for i := range n {
		f.Counts = append(f.Counts, int32(binary.LittleEndian.Uint32(body[HeaderLen+4*i:])))
	}
	f.HasHeading, f.HeadingRad = flags&FlagHeading != 0, 0
	if f.HasHeading {
		f.HeadingRad = math.Float32frombits(binary.LittleEndian.Uint32(body[HeaderLen+4*n:]))
		if h := float64(f.HeadingRad); math.IsNaN(h) || math.IsInf(h, 0) {
			return frameErr(ErrInvalid, "heading", "%v rad, not finite", h)
		}
	}
	return nil
}
