package server

import (
	"os"
	"testing"

	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/convert"
)

func TestRequestSample(t *testing.T) {
	s := &pb.Sample{Sample: &pb.Sample_Heading{Heading: &pb.HeadingSample{StampNs: 10, HeadingRad: 0.5, VarianceRad2: 1e-4}}}
	req, _ := proto.Marshal(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: 3, Sample: s})
	got := requestSample(req)
	var back pb.Sample
	if err := proto.Unmarshal(got, &back); err != nil || !proto.Equal(&back, s) {
		t.Fatalf("requestSample gave %x (%v), want the encoding of %v", got, err, s)
	}
	// The sample twice (decoders merge the two): no bytes, the caller encodes.
	twice := protowire.AppendTag(append([]byte(nil), req...), 3, protowire.BytesType)
	twice = protowire.AppendBytes(twice, got)
	if requestSample(twice) != nil {
		t.Error("a request holding the sample twice gave bytes")
	}
	for name, b := range map[string][]byte{"no sample": req[:len(req)-len(got)-2], "cut": req[:len(req)-1], "empty": nil} {
		if requestSample(b) != nil {
			t.Errorf("%s: gave bytes", name)
		}
	}
}

// FuzzRequestSample: whenever requestSample finds a sample in bytes that
// decode as an IngestRequest, those bytes decode to the request's sample.
func FuzzRequestSample(f *testing.F) {
	fh, err := os.Open("../testdata/samples/greenhouse-10s.jsonl")
	if err != nil {
		f.Fatal(err)
	}
	defer fh.Close()
	sr := convert.NewSampleReader(fh)
	for i := 0; i < 40; i++ {
		s, err := sr.Next()
		if err != nil {
			break
		}
		b, _ := proto.Marshal(&pb.IngestRequest{Robot: "robots/cart", ClientSequence: uint64(i), Sample: s})
		f.Add(b)
	}
	f.Fuzz(func(t *testing.T, b []byte) {
		got := requestSample(b)
		var req pb.IngestRequest
		if err := proto.Unmarshal(b, &req); err != nil {
			return
		}
		if got == nil {
			return
		}
		var s pb.Sample
		if err := proto.Unmarshal(got, &s); err != nil {
			t.Fatalf("sample bytes %x do not decode: %v", got, err)
		}
		if !proto.Equal(&s, req.GetSample()) {
			t.Fatalf("sample bytes decode to %v, the request holds %v", &s, req.GetSample())
		}
	})
}
