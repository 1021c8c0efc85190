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
	ok := eachField(req, func(num protowire.Number, typ protowire.Type, v []byte) {
		if num == sampleField && typ == protowire.BytesType {
			out, _ = protowire.ConsumeBytes(v)
			n++
		}
	})
	if !ok || n != 1 {
		return nil
	}
	return out
}

// robotField and sessionIDField are the field numbers of
// IngestRequest.robot and IngestRequest.session_id.
var (
	robotField     = (&pb.IngestRequest{}).ProtoReflect().Descriptor().Fields().ByName("robot").Number()
	sessionIDField = (&pb.IngestRequest{}).ProtoReflect().Descriptor().Fields().ByName("session_id").Number()
)

// clientSequenceField is the field number of IngestRequest.client_sequence.
var clientSequenceField = (&pb.IngestRequest{}).ProtoReflect().Descriptor().Fields().ByName("client_sequence").Number()

// clientSequenceOf returns the client sequence an encoded IngestRequest
// gives as far as it can be read (the last one, as a decoder keeps), or 0,
// so that the verdict on a request that does not decode still names it.
func clientSequenceOf(req []byte) uint64 {
	var cs uint64
	eachField(req, func(num protowire.Number, typ protowire.Type, v []byte) {
		if num == clientSequenceField && typ == protowire.VarintType {
			cs, _ = protowire.ConsumeVarint(v)
		}
	})
	return cs
}

// eachField calls f with each field of an encoded message in order: its
// number, wire type and encoded value (a length-delimited value with its
// length). It stops at the first field that does not parse, reporting
// false.
func eachField(b []byte, f func(num protowire.Number, typ protowire.Type, v []byte)) bool {
	for len(b) > 0 {
		num, typ, k := protowire.ConsumeTag(b)
		if k < 0 {
			return false
		}
		b = b[k:]
		m := protowire.ConsumeFieldValue(num, typ, b)
		if m < 0 {
			return false
		}
		f(num, typ, b[:m])
		b = b[m:]
	}
	return true
}
