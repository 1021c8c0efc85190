package server

import (
	"bytes"
	"testing"

	"google.golang.org/grpc/encoding"
	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
)

// TestCodec: the service's codec keeps an ingest request's bytes and sends
// a journaled verdict's bytes; the standard protobuf codec handles the same
// types as plain messages, so a Server registered without the codec works.
func TestCodec(t *testing.T) {
	req := &pb.IngestRequest{Robot: "robots/cart", ClientSequence: 4,
		Sample: &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: 7, HeadingRad: 0.2}}}}
	b, _ := proto.Marshal(req)
	resp := &pb.IngestResponse{ClientSequence: 4, Sequence: 9, Verdict: pb.Verdict_VERDICT_APPLIED}
	rb, _ := proto.Marshal(resp)

	for name, c := range map[string]encoding.CodecV2{"service": newCodec(), "standard": encoding.GetCodecV2("proto")} {
		got := &arrivedRequest{slab: &slab{}}
		if err := c.Unmarshal(mem.BufferSlice{mem.SliceBuffer(b)}, got); err != nil {
			t.Fatalf("%s: %v", name, err)
		}
		if !proto.Equal(&got.IngestRequest, req) {
			t.Errorf("%s: decoded %v, want %v", name, &got.IngestRequest, req)
		}
		if keeps := got.wire != nil; keeps != (name == "service") || (keeps && !bytes.Equal(got.wire, b)) {
			t.Errorf("%s: kept bytes %x", name, got.wire)
		}
		withBytes, without := &encodedResponse{wire: rb}, &encodedResponse{}
		proto.Merge(&withBytes.IngestResponse, resp)
		proto.Merge(&without.IngestResponse, resp)
		for _, e := range []*encodedResponse{withBytes, without} {
			out, err := c.Marshal(e)
			if err != nil {
				t.Fatalf("%s: %v", name, err)
			}
			var back pb.IngestResponse
			if err := proto.Unmarshal(out.Materialize(), &back); err != nil || !proto.Equal(&back, resp) {
				t.Errorf("%s: sent %x (%v), want %v", name, out.Materialize(), err, resp)
			}
		}
	}
	// A request that does not decode is an error, and is not kept.
	got := &arrivedRequest{slab: &slab{}}
	if err := newCodec().Unmarshal(mem.BufferSlice{mem.SliceBuffer(b[:len(b)-1])}, got); err == nil || got.wire != nil {
		t.Errorf("a cut request: err %v, kept %x", err, got.wire)
	}
}

// TestSlab: pieces never overlap, and one larger than a slab gets its own.
func TestSlab(t *testing.T) {
	s := &slab{}
	var pieces [][]byte
	for i, n := range []int{10, slabBytes - 20, 30, 3 * slabBytes, 5} {
		p := s.take(n)
		if len(p) != n || cap(p) != n {
			t.Fatalf("take(%d) gave len %d cap %d", n, len(p), cap(p))
		}
		for k := range p {
			p[k] = byte(i + 1)
		}
		pieces = append(pieces, p)
	}
	for i, p := range pieces {
		for _, c := range p {
			if c != byte(i+1) {
				t.Fatalf("piece %d was overwritten", i)
			}
		}
	}
}

// TestSlabMarshal: encodings in a verdict slab are those of proto.Marshal,
// capped and never overwritten by later ones; its buffers start small and
// double up to slabBytes, and one that does not fit takes a buffer of its
// own size at least.
func TestSlabMarshal(t *testing.T) {
	s := &slab{next: verdictSlabStart}
	small := func(i int) *pb.IngestResponse {
		return &pb.IngestResponse{Sequence: uint64(i + 1), ClientSequence: uint64(i + 7), Verdict: pb.Verdict_VERDICT_APPLIED, Nis: float64(i) / 3,
			Resolved: []*pb.Resolution{{Sequence: uint64(i), Verdict: pb.Verdict_VERDICT_APPLIED, Nis: 0.5}}}
	}
	big := &pb.IngestResponse{Sequence: 99, Reason: string(bytes.Repeat([]byte("r"), 3*verdictSlabStart))}
	var msgs []*pb.IngestResponse
	var got [][]byte
	caps := map[int]bool{}
	for i := range 4000 {
		m := small(i)
		if i == 1 || i == 2300 {
			m = big
		}
		b, err := s.marshal(m)
		if err != nil {
			t.Fatal(err)
		}
		if len(b) != cap(b) {
			t.Fatalf("message %d: len %d cap %d, want capped", i, len(b), cap(b))
		}
		msgs, got = append(msgs, m), append(got, b)
		caps[cap(s.buf)] = true
	}
	for i, m := range msgs {
		want, _ := proto.Marshal(m)
		if !bytes.Equal(got[i], want) {
			t.Fatalf("message %d: %x, want %x", i, got[i], want)
		}
	}
	for _, c := range []int{verdictSlabStart, 4 * verdictSlabStart, slabBytes} {
		if !caps[c] {
			t.Errorf("no buffer of %d bytes among %v", c, caps)
		}
	}
}
