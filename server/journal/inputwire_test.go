package journal

import (
	"math"
	"math/rand/v2"
	"testing"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// checkDecode checks the hand decoder against proto.Unmarshal (the
// protobuf module's decoder, the reference): where it decodes b, the
// message must be the one proto.Unmarshal gives, unknown fields and all.
// It returns whether the hand decoder took b.
func checkDecode(t testing.TB, d *inputDecoder, b []byte) bool {
	t.Helper()
	var got pb.JournalInput
	if !d.decode(b, &got) {
		return false
	}
	var want pb.JournalInput
	if err := proto.Unmarshal(b, &want); err != nil {
		t.Fatalf("hand decoder took %x, which proto.Unmarshal refuses: %v", b, err)
	}
	if !proto.Equal(&got, &want) {
		t.Fatalf("hand decoder gives %v for %x, proto.Unmarshal %v", &got, b, &want)
	}
	return true
}

func randomInput(r *rand.Rand) *pb.JournalInput {
	in := &pb.JournalInput{Sequence: r.Uint64N(1 << 40), ArrivalUnixNs: r.Int64(), ClientSequence: r.Uint64N(4) * r.Uint64()}
	if r.IntN(3) == 0 {
		in.SessionId = "session-7"
	}
	f := func() float64 {
		if r.IntN(10) == 0 {
			return []float64{0, math.Copysign(0, -1), math.Inf(1), math.NaN(), 5e-324}[r.IntN(5)]
		}
		return r.NormFloat64() * math.Pow(10, float64(r.IntN(20)-10))
	}
	switch r.IntN(6) {
	case 0, 1, 2:
		o := &pb.OdometrySample{StampNs: r.Int64N(1 << 50), StartNs: r.Int64N(1<<50) - r.Int64N(2)}
		switch r.IntN(4) {
		case 0:
			c := make([]int64, r.IntN(5))
			for i := range c {
				c[i] = r.Int64N(1<<20) - 1<<19
				if r.IntN(8) == 0 {
					c[i] = r.Int64()
				}
			}
			o.Motion = &pb.OdometrySample_Counts{Counts: &pb.WheelCounts{Counts: c}}
		case 1:
			t := make([]float64, r.IntN(5))
			for i := range t {
				t[i] = f()
			}
			o.Motion = &pb.OdometrySample_Travel{Travel: &pb.WheelTravel{TravelM: t}}
		case 2:
			o.Motion = &pb.OdometrySample_Step{Step: &pb.BodyStep{ForwardM: f(), LeftM: f(), TurnRad: f()}}
		}
		if r.IntN(2) == 0 {
			h := f()
			o.ImuHeadingRad = &h
		}
		in.Sample = &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: o}}
	case 3, 4:
		in.Sample = &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: r.Int64(), HeadingRad: f(), VarianceRad2: f()}}}
	default:
		in.Sample = &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: r.Int64(), SensorId: "camera", Measurement: &pb.Fix_Position{Position: &pb.PositionFix{XM: f(), YM: f()}}}}}
	}
	if r.IntN(20) == 0 {
		in.Sample = nil
	}
	return in
}

// TestInputDecoderEqualsProto checks the hand decoder on random inputs, as
// the writer encodes them and altered in the ways other encoders may
// write them (fields out of order, twice, unknown, unpacked lists, wrong
// wire types, cut short): it decodes the usual ones itself and gives the
// message proto.Unmarshal gives for every input it decodes.
func TestInputDecoderEqualsProto(t *testing.T) {
	r := rand.New(rand.NewPCG(13, 4))
	var d inputDecoder
	took := 0
	for i := 0; i < 20000; i++ {
		in := randomInput(r)
		b, err := proto.Marshal(in)
		if err != nil {
			t.Fatal(err)
		}
		_, isFix := in.GetSample().GetSample().(*pb.Sample_Fix)
		ok := checkDecode(t, &d, b)
		if !ok && !isFix {
			t.Fatalf("hand decoder did not take %v (%x)", in, b)
		}
		if ok {
			took++
		}
		// Altered encodings: each must be decoded as proto.Unmarshal
		// decodes it, or left to it.
		checkDecode(t, &d, alter(r, b))
	}
	// Encodings other decoders see differently, each left to
	// proto.Unmarshal.
	odo := func(fields ...[]byte) []byte {
		var o []byte
		for _, f := range fields {
			o = append(o, f...)
		}
		s := protowire.AppendBytes(protowire.AppendTag(nil, 1, protowire.BytesType), o)
		return protowire.AppendBytes(protowire.AppendTag(protowire.AppendVarint(protowire.AppendTag(nil, 1, protowire.VarintType), 9), 2, protowire.BytesType), s)
	}
	varint := func(num protowire.Number, v uint64) []byte {
		return protowire.AppendVarint(protowire.AppendTag(nil, num, protowire.VarintType), v)
	}
	counts := func(inner []byte) []byte {
		return protowire.AppendBytes(protowire.AppendTag(nil, 4, protowire.BytesType), inner)
	}
	for name, b := range map[string][]byte{
		"unpacked counts": odo(counts(varint(1, 5))),
		"empty packed":    odo(counts(protowire.AppendBytes(protowire.AppendTag(nil, 1, protowire.BytesType), nil))),
		"stamp twice":     odo(varint(1, 5), varint(1, 6)),
		"unknown field":   odo(varint(1, 5), varint(9, 6)),
		"two motions":     odo(counts(protowire.AppendBytes(protowire.AppendTag(nil, 1, protowire.BytesType), []byte{3})), protowire.AppendBytes(protowire.AppendTag(nil, 5, protowire.BytesType), nil)),
		"bad session":     append(varint(1, 3), protowire.AppendBytes(protowire.AppendTag(nil, 4, protowire.BytesType), []byte{0xff})...),
		"sample twice":    append(odo(varint(1, 5)), protowire.AppendBytes(protowire.AppendTag(nil, 2, protowire.BytesType), nil)...),
	} {
		if checkDecode(t, &d, b) {
			t.Errorf("%s: the hand decoder took it, proto.Unmarshal should have", name)
		}
	}
	t.Logf("%d of 20000 decoded by hand", took)
}

// alter changes an encoded input in one of the ways an encoder other than
// the writer may: a byte changed, cut short, a field appended (known or
// not), or the whole given twice.
func alter(r *rand.Rand, b []byte) []byte {
	c := append([]byte(nil), b...)
	switch r.IntN(5) {
	case 0:
		if len(c) > 0 {
			c[r.IntN(len(c))] ^= byte(1 << r.IntN(8))
		}
	case 1:
		c = c[:r.IntN(len(c)+1)]
	case 2:
		c = protowire.AppendVarint(protowire.AppendTag(c, protowire.Number(1+r.IntN(7)), protowire.VarintType), r.Uint64N(300))
	case 3:
		c = append(c, b...)
	default:
		c = protowire.AppendFixed64(protowire.AppendTag(c, protowire.Number(1+r.IntN(7)), protowire.Fixed64Type), r.Uint64())
	}
	return c
}

// FuzzInputDecoder: whatever the bytes, an input the hand decoder takes is
// the one proto.Unmarshal gives.
func FuzzInputDecoder(f *testing.F) {
	r := rand.New(rand.NewPCG(5, 6))
	for i := 0; i < 16; i++ {
		b, _ := proto.Marshal(randomInput(r))
		f.Add(b)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		var d inputDecoder
		checkDecode(t, &d, b)
	})
}
