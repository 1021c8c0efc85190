package server

import (
	"bytes"
	"math"
	"math/rand/v2"
	"strings"
	"testing"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"
	"google.golang.org/protobuf/reflect/protoreflect"

	pb "reckon.example/proto/reckon/v1"
)

// TestPlainVerdictMatchesProto: the verdicts appendPlainVerdict encodes
// get the bytes proto.Marshal (protobuf-go, the reference encoder) makes
// of them, and those it leaves to proto are the ones it must: with events
// or unknown fields (in the verdict or a resolution), or a string that is
// not UTF-8.
func TestPlainVerdictMatchesProto(t *testing.T) {
	// appendPlainVerdict writes fields 1 to 7 and 9 to 11 and leaves
	// verdicts with 8 (events) to proto; a field added to IngestResponse
	// or Resolution would be dropped silently, so the messages must still
	// have exactly those.
	fields := (&pb.IngestResponse{}).ProtoReflect().Descriptor().Fields()
	if fields.Len() != 11 {
		t.Fatalf("IngestResponse has %d fields; appendPlainVerdict knows 11: teach it the new ones", fields.Len())
	}
	for n := 1; n <= 11; n++ {
		if fields.ByNumber(protoreflect.FieldNumber(n)) == nil {
			t.Fatalf("IngestResponse has no field %d; appendPlainVerdict writes fields 1 to 11", n)
		}
	}
	if rf := (&pb.Resolution{}).ProtoReflect().Descriptor().Fields(); rf.Len() != 6 {
		t.Fatalf("Resolution has %d fields; appendResolution knows 6: teach it the new ones", rf.Len())
	}
	cases := []*pb.IngestResponse{
		{},
		{ClientSequence: 1, Sequence: 1, Verdict: pb.Verdict_VERDICT_APPLIED},
		{ClientSequence: math.MaxUint64, Sequence: 1 << 40, Verdict: pb.Verdict_VERDICT_INVALID, Reason: "time_backwards", StatusCode: 3, Refusal: pb.Refusal_REFUSAL_TIME_BACKWARDS, Field: "sample.odometry.stamp_ns"},
		{Nis: 3.25, NisDimension: 2},
		{Nis: math.Copysign(0, -1)}, // -0 is encoded, +0 left out
		{Nis: math.NaN(), NisDimension: -1, StatusCode: -7, Verdict: pb.Verdict(-2), Refusal: pb.Refusal(-3)},
		{Nis: math.Inf(1), Reason: strings.Repeat("ü", 100)}, // a length of two bytes
		{Reason: strings.Repeat("x", 300)},                   // past the stack buffer
		{Sequence: 4, Resolved: []*pb.Resolution{{}}},
		{Sequence: 7, Resolved: []*pb.Resolution{{Sequence: 6, Verdict: pb.Verdict_VERDICT_APPLIED, Nis: 0.25, ClientSequence: 9}, {Sequence: 5, Verdict: pb.Verdict_VERDICT_TOO_OLD, Reason: "too_old", Refusal: pb.Refusal_REFUSAL_TOO_OLD}}},
		{Resolved: []*pb.Resolution{{Nis: math.Copysign(0, -1), Verdict: pb.Verdict(-1), Refusal: pb.Refusal(-4)}}},
		{Resolved: []*pb.Resolution{{Sequence: 1, Reason: strings.Repeat("y", 130)}}},   // a length of two bytes, past the stack buffer
		{Resolved: []*pb.Resolution{{Sequence: 1, Reason: strings.Repeat("y", 20000)}}}, // a length of three bytes
	}
	rng := rand.New(rand.NewPCG(1, 1))
	for range 2000 {
		r := &pb.IngestResponse{}
		if rng.IntN(2) == 0 {
			r.ClientSequence = rng.Uint64() >> rng.IntN(64)
		}
		if rng.IntN(2) == 0 {
			r.Sequence = rng.Uint64() >> rng.IntN(64)
		}
		r.Verdict = pb.Verdict(rng.IntN(5))
		if rng.IntN(3) == 0 {
			r.Reason = strings.Repeat("r", rng.IntN(200))
		}
		if rng.IntN(2) == 0 {
			r.Nis = rng.NormFloat64() * 10
		}
		r.NisDimension = int32(rng.IntN(4))
		if rng.IntN(4) == 0 {
			r.StatusCode, r.Refusal = int32(rng.IntN(17)), pb.Refusal(rng.IntN(5))
		}
		if rng.IntN(4) == 0 {
			r.Field = "sample.fix.x_m"
		}
		for range rng.IntN(4) {
			res := &pb.Resolution{Sequence: rng.Uint64() >> rng.IntN(64), Verdict: pb.Verdict(rng.IntN(6)), ClientSequence: rng.Uint64() >> rng.IntN(64)}
			if rng.IntN(2) == 0 {
				res.Nis = rng.ExpFloat64()
			}
			if rng.IntN(3) == 0 {
				res.Reason, res.Refusal = strings.Repeat("q", rng.IntN(140)), pb.Refusal(rng.IntN(5))
			}
			r.Resolved = append(r.Resolved, res)
		}
		cases = append(cases, r)
	}
	for i, r := range cases {
		want, err := proto.Marshal(r)
		if err != nil {
			t.Fatal(err)
		}
		vs := &slab{next: verdictSlabStart}
		got, err := vs.marshalVerdict(r)
		if err != nil || !bytes.Equal(got, want) {
			t.Fatalf("case %d (%v): %x, %v; proto.Marshal gives %x", i, r, got, err, want)
		}
		if plain, ok := appendPlainVerdict(nil, r); !ok {
			t.Errorf("case %d (%v) left to proto", i, r)
		} else if !bytes.Equal(plain, want) {
			t.Fatalf("case %d (%v): appendPlainVerdict gives %x; proto.Marshal gives %x", i, r, plain, want)
		}
	}

	others := []*pb.IngestResponse{
		{Sequence: 4, Events: []*pb.FusionEvent{{}}},
		{Sequence: 4, Resolved: []*pb.Resolution{{Reason: "bad \xfe"}}},
		{Sequence: 4, Reason: "bad \xff"},
		{Sequence: 4, Field: "\xc3"},
	}
	withUnknown := &pb.IngestResponse{Sequence: 4}
	withUnknown.ProtoReflect().SetUnknown(protowire.AppendVarint(protowire.AppendTag(nil, 99, protowire.VarintType), 1))
	resUnknown := &pb.Resolution{Sequence: 3}
	resUnknown.ProtoReflect().SetUnknown(protowire.AppendVarint(protowire.AppendTag(nil, 98, protowire.VarintType), 1))
	others = append(others, withUnknown, &pb.IngestResponse{Sequence: 4, Resolved: []*pb.Resolution{resUnknown}})
	for i, r := range others {
		if _, ok := appendPlainVerdict(nil, r); ok {
			t.Errorf("other %d (%v) encoded without proto", i, r)
		}
		want, werr := proto.Marshal(r)
		got, gerr := (&slab{}).marshalVerdict(r)
		if (werr != nil) != (gerr != nil) || werr == nil && !bytes.Equal(got, want) {
			t.Errorf("other %d: %x, %v; proto.Marshal gives %x, %v", i, got, gerr, want, werr)
		}
	}
}
