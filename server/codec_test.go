package server

import (
	"bytes"
	"fmt"
	"os"
	"strings"
	"testing"

	"google.golang.org/grpc/encoding"
	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
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
	// A request that does not decode is marked malformed with its client
	// sequence (answered as its own verdict, the stream going on), and is
	// not kept.
	got := &arrivedRequest{slab: &slab{}}
	if err := newCodec().Unmarshal(mem.BufferSlice{mem.SliceBuffer(b[:len(b)-1])}, got); err != nil || got.malformed == nil || got.GetClientSequence() != 4 || got.wire != nil {
		t.Errorf("a cut request: err %v, malformed %v, client sequence %d, kept %x", err, got.malformed, got.GetClientSequence(), got.wire)
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

// requestSeeds returns encoded requests of every kind of sample in the
// greenhouse run, for two robots and sessions in turns.
func requestSeeds(tb testing.TB, n int) [][]byte {
	fh, err := os.Open("../testdata/samples/greenhouse-10s.jsonl")
	if err != nil {
		tb.Fatal(err)
	}
	defer fh.Close()
	sr := convert.NewSampleReader(fh)
	var out [][]byte
	for i := 0; i < n; i++ {
		s, err := sr.Next()
		if err != nil {
			break
		}
		req := &pb.IngestRequest{Robot: fmt.Sprintf("robots/cart-%d", i%2), ClientSequence: uint64(i), Sample: s}
		if i%3 != 0 {
			req.SessionId = fmt.Sprintf("feed-%d", i%2)
		}
		b, _ := proto.Marshal(req)
		out = append(out, b)
	}
	return out
}

// checkRequest decodes b with the service's codec (one stream's decoder,
// dec) and with proto.Unmarshal, the protobuf module's decoder (the
// reference): both refuse it (the codec marking it malformed), or both
// give the same request, unknown fields and all. It returns whether the hand decoder took it.
func checkRequest(t testing.TB, dec *requestDecoder, b []byte) bool {
	t.Helper()
	var want pb.IngestRequest
	werr := proto.Unmarshal(b, &want)
	var hand pb.IngestRequest
	took := decodeRequest(dec, b, &hand)
	if took && (werr != nil || !proto.Equal(&hand, &want)) {
		t.Fatalf("decodeRequest took %x as %v; proto.Unmarshal gives %v, %v", b, &hand, &want, werr)
	}
	got := &arrivedRequest{slab: &slab{}, dec: dec}
	if err := newCodec().Unmarshal(mem.BufferSlice{mem.SliceBuffer(b)}, got); err != nil {
		// A request it refuses is answered as its own verdict
		// (arrivedRequest.malformed), not the stream's end.
		t.Fatalf("the codec fails on %x: %v", b, err)
	}
	if gerr := got.malformed; (gerr != nil) != (werr != nil) || werr == nil && !proto.Equal(&got.IngestRequest, &want) {
		t.Fatalf("the codec gives %v, %v for %x; proto.Unmarshal %v, %v", &got.IngestRequest, gerr, b, &want, werr)
	}
	// Read as a request too large to take, across two buffers, it gives
	// the robot, client sequence and session id proto.Unmarshal gives
	// (strings no longer than headerStringBytes).
	var big pb.IngestRequest
	tooLargeRequest(mem.BufferSlice{mem.SliceBuffer(b[:len(b)/2]), mem.SliceBuffer(b[len(b)/2:])}, &big)
	short := len(want.GetRobot()) <= headerStringBytes && len(want.GetSessionId()) <= headerStringBytes
	if werr == nil && short && (big.GetRobot() != want.GetRobot() || big.GetClientSequence() != want.GetClientSequence() || big.GetSessionId() != want.GetSessionId()) {
		t.Fatalf("tooLargeRequest reads %x as %v; proto.Unmarshal gives %v", b, &big, &want)
	}
	return took
}

// TestDecodeRequest: the requests a robot sends nearly always, odometry
// and IMU headings, are decoded by hand into the messages proto.Unmarshal
// gives; fixes and everything proto.Unmarshal would merge, replace, keep
// or refuse are left to it, with the same outcome.
func TestDecodeRequest(t *testing.T) {
	dec := &requestDecoder{}
	took, kinds := 0, map[string]int{}
	for _, b := range requestSeeds(t, 400) {
		var req pb.IngestRequest
		proto.Unmarshal(b, &req)
		kind := fmt.Sprintf("%T", req.GetSample().GetSample())
		kinds[kind]++
		if checkRequest(t, dec, b) {
			took++
		} else if req.GetSample().GetOdometry() != nil || req.GetSample().GetHeading() != nil {
			t.Errorf("a %s request left to proto.Unmarshal: %v", kind, &req)
		}
	}
	if took < 300 || len(kinds) < 3 {
		t.Fatalf("%d of 400 taken by hand, kinds %v", took, kinds)
	}
	odo, _ := proto.Marshal(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: 3, SessionId: "s",
		Sample: &pb.Sample{Sample: &pb.Sample_Odometry{Odometry: &pb.OdometrySample{StampNs: 5, StartNs: 1,
			Motion: &pb.OdometrySample_Counts{Counts: &pb.WheelCounts{Counts: []int64{-1, 1 << 40}}}}}}})
	unknown := protowire.AppendVarint(protowire.AppendTag(append([]byte(nil), odo...), 9, protowire.VarintType), 1)
	robotTwice := protowire.AppendString(protowire.AppendTag(append([]byte(nil), odo...), 1, protowire.BytesType), "robots/other")
	// An unknown field holding what a sample holds: kept as unknown.
	unknownSample := protowire.AppendBytes(protowire.AppendTag(append([]byte(nil), odo...), 5, protowire.BytesType), requestSample(odo))
	seqTwice := protowire.AppendVarint(protowire.AppendTag(append([]byte(nil), odo...), 2, protowire.VarintType), 8)
	seqAsBytes := protowire.AppendString(protowire.AppendTag(nil, 2, protowire.BytesType), "x")
	badRobot := protowire.AppendString(protowire.AppendTag(nil, 1, protowire.BytesType), "robots/\xff")
	badSession := protowire.AppendString(protowire.AppendTag(nil, 4, protowire.BytesType), "\xc3")
	for name, b := range map[string][]byte{"unknown field": unknown, "unknown field like a sample": unknownSample, "robot twice": robotTwice, "sequence twice": seqTwice,
		"sequence as bytes": seqAsBytes, "robot not UTF-8": badRobot, "session not UTF-8": badSession, "cut": odo[:len(odo)-1]} {
		if checkRequest(t, dec, b) {
			t.Errorf("%s: taken by hand", name)
		}
	}
	if !checkRequest(t, dec, odo) || !checkRequest(t, dec, nil) {
		t.Error("an odometry request or an empty one left to proto.Unmarshal")
	}
}

// markerFixRequest is a request carrying a pose fix that names its marker
// (PoseFix.marker), beside a mount and a covariance.
func markerFixRequest() []byte {
	b, _ := proto.Marshal(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: 5, SessionId: "s",
		Sample: &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{StampNs: 7e8, SensorId: "camera", Mount: &pb.FloorPose{XM: 0.25},
			Measurement: &pb.Fix_Pose{Pose: &pb.PoseFix{XM: 5, YM: 0.8, HeadingRad: 0.1, Marker: "post-1-0"}},
			Covariance:  &pb.Covariance{Dimension: 3, Values: []float64{4e-4, 0, 0, 0, 4e-4, 0, 0, 0, 6e-4}}}}}})
	return b
}

// TestDecodeMarkerFix: a pose fix's marker arrives through the service's
// codec as proto.Unmarshal reads it (the hand decoder leaves fixes to it),
// and a cut or doubled marker field is refused or merged by both alike.
func TestDecodeMarkerFix(t *testing.T) {
	dec := &requestDecoder{}
	b := markerFixRequest()
	checkRequest(t, dec, b)
	got := &arrivedRequest{slab: &slab{}, dec: dec}
	if err := newCodec().Unmarshal(mem.BufferSlice{mem.SliceBuffer(b)}, got); err != nil {
		t.Fatal(err)
	}
	if m := got.GetSample().GetFix().GetPose().GetMarker(); m != "post-1-0" || !bytes.Equal(got.wire, b) {
		t.Errorf("marker %q, kept %x", m, got.wire)
	}
	for _, c := range [][]byte{b[:len(b)-3], append(append([]byte(nil), b...), b...)} {
		checkRequest(t, dec, c)
	}
}

// FuzzDecodeRequest: whatever the bytes, the service's codec and
// proto.Unmarshal agree on the request, or both refuse it.
func FuzzDecodeRequest(f *testing.F) {
	for _, b := range requestSeeds(f, 40) {
		f.Add(b)
	}
	// A pose fix naming its marker (PoseFix.marker, field 4).
	f.Add(markerFixRequest())
	dec := &requestDecoder{}
	f.Fuzz(func(t *testing.T, b []byte) {
		checkRequest(t, dec, b)
	})
}

// TestCodecTooLarge: past its limit the codec decodes nothing and copies
// nothing: an ingest request is marked too large with its client sequence
// (read past the sample, across several buffers) and takes
// no piece of the slab; another rpc's request carries the error beside it
// (checkedDecode answers RESOURCE_EXHAUSTED); any other message is an
// error. At the limit the request decodes.
func TestCodecTooLarge(t *testing.T) {
	req := &pb.IngestRequest{Robot: "robots/cart", ClientSequence: 300, Sample: &pb.Sample{Sample: &pb.Sample_Fix{Fix: &pb.Fix{SensorId: strings.Repeat("c", 3000)}}}}
	b, err := proto.Marshal(req)
	if err != nil {
		t.Fatal(err)
	}
	split := mem.BufferSlice{mem.SliceBuffer(b[:5]), mem.SliceBuffer(b[5:17]), mem.SliceBuffer(b[17:])}
	c := newCodec()
	c.max = len(b) - 1
	sl := &slab{}
	got := &arrivedRequest{slab: sl}
	if err := c.Unmarshal(split, got); err != nil || got.malformed != (tooLargeError{len(b), len(b) - 1}) || got.GetClientSequence() != 300 || got.wire != nil || sl.buf != nil {
		t.Errorf("an ingest request 1 byte too large: err %v, malformed %v, client sequence %d, kept %d bytes, slab %d", err, got.malformed, got.GetClientSequence(), len(got.wire), len(sl.buf))
	}
	u := &unaryRequest{Message: &pb.IngestRequest{}}
	if err := c.Unmarshal(split, u); err != nil || u.err != (tooLargeError{len(b), len(b) - 1}) {
		t.Errorf("a unary request 1 byte too large: %v, %v", err, u.err)
	}
	if err := c.Unmarshal(split, &pb.IngestRequest{}); err == nil || !strings.Contains(err.Error(), "-max-message-bytes") {
		t.Errorf("another message 1 byte too large: %v", err)
	}
	c.max = len(b)
	got = &arrivedRequest{slab: &slab{}}
	if err := c.Unmarshal(split, got); err != nil || got.malformed != nil || !proto.Equal(&got.IngestRequest, req) {
		t.Errorf("a request at the limit: %v, %v", err, got.malformed)
	}
	// Its robot, client sequence and session id are read from the
	// fields past the sample, the last of each as a decoder keeps it; a
	// robot's name too long for any robot is left out.
	req.SessionId, req.ClientSequence = "s-1", 0
	if b, err = proto.Marshal(req); err != nil {
		t.Fatal(err)
	}
	b = protowire.AppendVarint(protowire.AppendTag(b, clientSequenceField, protowire.VarintType), 301)
	b = protowire.AppendString(protowire.AppendTag(b, robotField, protowire.BytesType), strings.Repeat("r", headerStringBytes+1))
	c.max = 100
	got = &arrivedRequest{slab: &slab{}}
	if err := c.Unmarshal(mem.BufferSlice{mem.SliceBuffer(b[:2000]), mem.SliceBuffer(b[2000:])}, got); err != nil ||
		got.GetClientSequence() != 301 || got.GetSessionId() != "s-1" || got.GetRobot() != "" || got.GetSample() != nil {
		t.Errorf("a request past the limit with its client sequence after the sample: %v, %v", err, &got.IngestRequest)
	}
}
