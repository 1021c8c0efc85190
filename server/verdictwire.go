package server

import (
	"math"
	"unicode/utf8"

	"google.golang.org/protobuf/encoding/protowire"

	pb "reckon.example/proto/reckon/v1"
)

// maxPlainVerdict bounds the encoding appendPlainVerdict makes on the
// stack; a longer one (long reason or field strings) is left to proto.
const maxPlainVerdict = 256

// appendPlainVerdict appends the protobuf encoding of a verdict without
// events or unknown fields (nearly every verdict at a robot's rates: an
// odometry sample's verdict carries the resolution of the IMU heading it
// released), the bytes proto.Marshal makes of it: fields in number order,
// proto3 zero values left out (a double is left out only when it is +0),
// negative int32 and enum values as ten-byte varints, a resolution as a
// length-delimited message (Protocol Buffers encoding guide, "Varints",
// "Signed Integers" and "Length-Delimited Records"; protobuf-go's
// generated coders). ok is false for any other verdict, and for a string
// that is not UTF-8, which proto.Marshal refuses: the caller encodes those
// with proto. Encoding through proto (Size, then MarshalAppend) cost about
// 1.4 us a sample in BenchmarkRobotRates' profile; the verdicts with a
// resolution, a third of them, took about 1,200 instructions a sample of
// the 18,000 the service spent (callgrind of BenchmarkRatesPath's inputs,
// session 18).
func appendPlainVerdict(b []byte, r *pb.IngestResponse) (out []byte, ok bool) {
	if len(r.Events) > 0 || len(r.ProtoReflect().GetUnknown()) > 0 ||
		!utf8.ValidString(r.Reason) || !utf8.ValidString(r.Field) {
		return b, false
	}
	for _, res := range r.Resolved {
		if res == nil || len(res.ProtoReflect().GetUnknown()) > 0 || !utf8.ValidString(res.Reason) {
			return b, false
		}
	}
	if v := r.ClientSequence; v != 0 {
		b = protowire.AppendVarint(append(b, 1<<3|byte(protowire.VarintType)), v)
	}
	if v := r.Sequence; v != 0 {
		b = protowire.AppendVarint(append(b, 2<<3|byte(protowire.VarintType)), v)
	}
	if v := r.Verdict; v != 0 {
		b = protowire.AppendVarint(append(b, 3<<3|byte(protowire.VarintType)), uint64(int64(v)))
	}
	if v := r.Reason; v != "" {
		b = protowire.AppendString(append(b, 4<<3|byte(protowire.BytesType)), v)
	}
	if v := r.Nis; v != 0 || math.Signbit(v) {
		b = protowire.AppendFixed64(append(b, 5<<3|byte(protowire.Fixed64Type)), math.Float64bits(v))
	}
	if v := r.NisDimension; v != 0 {
		b = protowire.AppendVarint(append(b, 6<<3|byte(protowire.VarintType)), uint64(int64(v)))
	}
	for _, res := range r.Resolved {
		b = appendResolution(b, res)
	}
	if v := r.StatusCode; v != 0 {
		b = protowire.AppendVarint(append(b, 9<<3|byte(protowire.VarintType)), uint64(int64(v)))
	}
	if v := r.Refusal; v != 0 {
		b = protowire.AppendVarint(append(b, 10<<3|byte(protowire.VarintType)), uint64(int64(v)))
	}
	if v := r.Field; v != "" {
		b = protowire.AppendString(append(b, 11<<3|byte(protowire.BytesType)), v)
	}
	return b, true
}

// marshalVerdict returns r's encoding as a piece of the slab.
func (s *slab) marshalVerdict(r *pb.IngestResponse) ([]byte, error) {
	var stack [maxPlainVerdict]byte
	if enc, ok := appendPlainVerdict(stack[:0], r); ok && len(enc) <= maxPlainVerdict {
		b := s.take(len(enc))
		copy(b, enc)
		return b, nil
	}
	return s.marshal(r)
}

// appendResolution appends res as field 7 of a verdict: its tag, its
// length and its fields in number order (appendPlainVerdict).
func appendResolution(b []byte, res *pb.Resolution) []byte {
	b = append(b, 7<<3|byte(protowire.BytesType), 0)
	start := len(b)
	if v := res.Sequence; v != 0 {
		b = protowire.AppendVarint(append(b, 1<<3|byte(protowire.VarintType)), v)
	}
	if v := res.Verdict; v != 0 {
		b = protowire.AppendVarint(append(b, 2<<3|byte(protowire.VarintType)), uint64(int64(v)))
	}
	if v := res.Nis; v != 0 || math.Signbit(v) {
		b = protowire.AppendFixed64(append(b, 3<<3|byte(protowire.Fixed64Type)), math.Float64bits(v))
	}
	if v := res.Reason; v != "" {
		b = protowire.AppendString(append(b, 4<<3|byte(protowire.BytesType)), v)
	}
	if v := res.Refusal; v != 0 {
		b = protowire.AppendVarint(append(b, 5<<3|byte(protowire.VarintType)), uint64(int64(v)))
	}
	if v := res.ClientSequence; v != 0 {
		b = protowire.AppendVarint(append(b, 6<<3|byte(protowire.VarintType)), v)
	}
	n := len(b) - start
	if n < 0x80 {
		b[start-1] = byte(n)
		return b
	}
	// A length of more than one byte (a long reason): move the fields up.
	w := protowire.SizeVarint(uint64(n))
	b = append(b, make([]byte, w-1)...)
	copy(b[start+w-1:], b[start:start+n])
	protowire.AppendVarint(b[:start-1], uint64(n))
	return b
}
