package bridge

import (
	"bytes"
	"encoding/hex"
	"errors"
	"math"
	"testing"
)

// TestChecksum checks the CRC-32C check value. Source: Greg Cook,
// "Catalogue of parametrised CRC algorithms" (reveng.sourceforge.net/crc-catalogue),
// entry CRC-32/ISCSI: check=0xe3069283 for the ASCII string "123456789".
func TestChecksum(t *testing.T) {
	if got := Checksum([]byte("123456789")); got != 0xE3069283 {
		t.Errorf("CRC-32C(\"123456789\") = %08X, want E3069283", got)
	}
}

// seq returns the bytes lo, lo+1, ..., hi.
func seq(lo, hi int) []byte {
	var b []byte
	for i := lo; i <= hi; i++ {
		b = append(b, byte(i))
	}
	return b
}

func cat(parts ...[]byte) []byte { return bytes.Join(parts, nil) }

// cobsExamples are the worked examples of the COBS article of the English
// Wikipedia ("Consistent Overhead Byte Stuffing", section "Encoding
// examples", recalled from memory), whose first ones follow Cheshire and
// Baker 1999, figure 2; the encoded side is shown without its 0x00
// delimiter.
var cobsExamples = []struct {
	name      string
	raw, cobs []byte
}{
	{"1 zero", []byte{0x00}, []byte{0x01, 0x01}},
	{"2 zeros", []byte{0x00, 0x00}, []byte{0x01, 0x01, 0x01}},
	{"3", []byte{0x00, 0x11, 0x00}, []byte{0x01, 0x02, 0x11, 0x01}},
	{"4", []byte{0x11, 0x22, 0x00, 0x33}, []byte{0x03, 0x11, 0x22, 0x02, 0x33}},
	{"5", []byte{0x11, 0x22, 0x33, 0x44}, []byte{0x05, 0x11, 0x22, 0x33, 0x44}},
	{"6", []byte{0x11, 0x00, 0x00, 0x00}, []byte{0x02, 0x11, 0x01, 0x01, 0x01}},
	{"7: 254 non-zero", seq(0x01, 0xFE), cat([]byte{0xFF}, seq(0x01, 0xFE))},
	{"8: zero and 254", cat([]byte{0x00}, seq(0x01, 0xFE)), cat([]byte{0x01, 0xFF}, seq(0x01, 0xFE))},
	{"9: 255 non-zero", seq(0x01, 0xFF), cat([]byte{0xFF}, seq(0x01, 0xFE), []byte{0x02, 0xFF})},
	{"10: 254 and zero", cat(seq(0x02, 0xFF), []byte{0x00}), cat([]byte{0xFF}, seq(0x02, 0xFF), []byte{0x01, 0x01})},
	{"11", cat(seq(0x03, 0xFF), []byte{0x00, 0x01}), cat([]byte{0xFE}, seq(0x03, 0xFF), []byte{0x02, 0x01})},
	{"empty", nil, []byte{0x01}},
}

func TestCOBS(t *testing.T) {
	for _, c := range cobsExamples {
		t.Run(c.name, func(t *testing.T) {
			if got := AppendCOBS(nil, c.raw); !bytes.Equal(got, c.cobs) {
				t.Errorf("encode:\n got %s\nwant %s", hex.EncodeToString(got), hex.EncodeToString(c.cobs))
			}
			got, err := AppendUnCOBS(nil, c.cobs)
			if err != nil || !bytes.Equal(got, c.raw) {
				t.Errorf("decode: %s, %v\nwant %s", hex.EncodeToString(got), err, hex.EncodeToString(c.raw))
			}
		})
	}
	for _, bad := range [][]byte{{0x03, 0x11}, {0x02, 0x00}, {0x00}} {
		if _, err := AppendUnCOBS(nil, bad); !errors.Is(err, ErrCOBS) {
			t.Errorf("decoding % x: %v, want ErrCOBS", bad, err)
		}
	}
}

func TestFrameRoundTrip(t *testing.T) {
	frames := []Frame{
		{Type: FrameWheels, Boot: 7, Counter: 1, StampUs: 4294967295, Counts: []int32{0, -1, math.MaxInt32}},
		{Type: FrameWheels, Counter: 0, StampUs: 0, Counts: []int32{1, 2, 3, 4, 5, 6, 7, math.MinInt32}, HasHeading: true, HeadingRad: -3.1415927},
		{Type: FrameWheels, Boot: 255, Counter: 0x01000000, StampUs: MaxStampUs, Counts: []int32{256}, HasHeading: true},
	}
	for i, f := range frames {
		enc := AppendFrame(nil, &f, make([]byte, 0, MaxFrameLen))
		if bytes.IndexByte(enc, 0) != len(enc)-1 || len(enc) > MaxEncodedLen+1 {
			t.Fatalf("frame %d: encoded % x: the delimiter must be the only zero, within %d bytes", i, enc, MaxEncodedLen+1)
		}
		raw, err := AppendUnCOBS(nil, enc[:len(enc)-1])
		if err != nil {
			t.Fatal(err)
		}
		var got Frame
		if err := ParseFrame(&got, raw); err != nil {
			t.Fatalf("frame %d: %v", i, err)
		}
		if got.Type != f.Type || got.Boot != f.Boot || got.Counter != f.Counter || got.StampUs != f.StampUs ||
			got.HasHeading != f.HasHeading || got.HeadingRad != f.HeadingRad || !equalCounts(got.Counts, f.Counts) {
			t.Errorf("frame %d: got %+v, want %+v", i, got, f)
		}
		// Every single-bit error is caught by the CRC (a CRC of degree 32
		// detects all errors of one bit: common practice).
		for bit := range 8 * len(raw) {
			bad := bytes.Clone(raw)
			bad[bit/8] ^= 1 << (bit % 8)
			if err := ParseFrame(&got, bad); !errors.Is(err, ErrCorrupt) {
				t.Fatalf("frame %d, bit %d flipped: %v, want ErrCorrupt", i, bit, err)
			}
		}
	}
}

func equalCounts(a, b []int32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}

// TestParseFrameInvalid: frames with a good CRC that the protocol does not
// allow.
func TestParseFrameInvalid(t *testing.T) {
	good := AppendRawFrame(nil, &Frame{Type: FrameWheels, Counts: []int32{1, 2}})
	reseal := func(body []byte) []byte {
		return append(body, byte(Checksum(body)), byte(Checksum(body)>>8), byte(Checksum(body)>>16), byte(Checksum(body)>>24))
	}
	body := func() []byte { return bytes.Clone(good[:len(good)-4]) }
	nanHeading := AppendRawFrame(nil, &Frame{Type: FrameWheels, Counts: []int32{1}, HasHeading: true, HeadingRad: float32(math.NaN())})
	farStamp := AppendRawFrame(nil, &Frame{Type: FrameWheels, Counts: []int32{1}, StampUs: MaxStampUs + 1})
	cases := map[string][]byte{
		"type 2":          reseal(append([]byte{2}, body()[1:]...)),
		"flag bit 1":      reseal(append([]byte{1, 2}, body()[2:]...)),
		"no wheels":       reseal(append(body()[:3], append([]byte{0}, body()[4:]...)...)),
		"one wheel short": reseal(append(body()[:3], append([]byte{3}, body()[4:]...)...)),
		"NaN heading":     nanHeading,
		"stamp too far":   farStamp,
	}
	for name, raw := range cases {
		var f Frame
		if err := ParseFrame(&f, raw); !errors.Is(err, ErrInvalid) {
			t.Errorf("%s: %v, want ErrInvalid", name, err)
		}
	}
	var f Frame
	if err := ParseFrame(&f, good[:10]); !errors.Is(err, ErrCorrupt) {
		t.Errorf("short frame: %v, want ErrCorrupt", err)
	}
}
