package server

import (
	"google.golang.org/protobuf/encoding/protowire"

	pb "reckon.example/proto/reckon/v1"
)

// sampleField is the field number of IngestRequest.sample.
var sampleField = (&pb.IngestRequest{}).ProtoReflect().Descriptor().Fields().ByName("sample").Number()

// requestSample returns the bytes of the sample inside an encoded
// IngestRequest, so that the journal can keep the sample as it arrived
// without encoding it again. It returns nil when the request does not parse
// or does not hold the sample exactly once (a repeated message field is
// merged by decoders; the caller then encodes the decoded sample instead).
func requestSample(req []byte) []byte {
	var out []byte
	n := 0
	for len(req) > 0 {
		num, typ, k := protowire.ConsumeTag(req)
		if k < 0 {
			return nil
		}
		req = req[k:]
		if num == sampleField && typ == protowire.BytesType {
			v, m := protowire.ConsumeBytes(req)
			if m < 0 {
				return nil
			}
			out, n, req = v, n+1, req[m:]
			continue
		}
		m := protowire.ConsumeFieldValue(num, typ, req)
		if m < 0 {
			return nil
		}
		req = req[m:]
	}
	if n != 1 {
		return nil
	}
	return out
}
