package server

import (
	"encoding/binary"
	"fmt"
	"io"
	"math"
	"time"
	"unicode/utf8"

	"google.golang.org/grpc/encoding"
	_ "google.golang.org/grpc/encoding/proto" // registers the protobuf codec that codec wraps
	"google.golang.org/grpc/mem"
	"google.golang.org/protobuf/encoding/protowire"
	"google.golang.org/protobuf/proto"

	pb "reckon.example/proto/reckon/v1"
	"reckon.example/server/journal"
)

// codec is the service's gRPC codec: protobuf, except on the ingest path,
// where a request keeps the bytes it arrived as (the journal records its
// sample as it came, without encoding it again) and a verdict already
// encoded for the journal is sent as those bytes. Every other message goes
// through the standard protobuf codec. ServiceOptions installs it; a Server
// registered on a gRPC server without it works the same, only with an
// encoding more per sample.
//
// It refuses a request larger than max bytes (0: no limit) before decoding
// it: an ingest request as its own verdict, so that the stream goes on; a
// request of another rpc with RESOURCE_EXHAUSTED (through unaryRequest).
// gRPC's own limit, which ends the whole stream, is set above it
// (ServiceOptions).
type codec struct {
	std encoding.CodecV2
	max int
}

func newCodec() codec { return codec{std: encoding.GetCodecV2("proto")} }

// tooLargeError is the codec's refusal of a request past its limit.
type tooLargeError struct{ size, max int }

func (e tooLargeError) Error() string {
	return fmt.Sprintf("request: %d bytes exceeds the limit of %d (-max-message-bytes)", e.size, e.max)
}

// headerStringBytes bounds the robot's name and the session id read from
// a request too large to take (tooLargeRequest): a longer one is left
// out, as no robot or session has it (-max-string-bytes).
const headerStringBytes = 1 << 10

// Name is the content subtype: the codec speaks plain protobuf.
func (codec) Name() string { return "proto" }

func (c codec) Marshal(v any) (mem.BufferSlice, error) {
	if e, ok := v.(*encodedResponse); ok && e.wire != nil {
		return mem.BufferSlice{mem.SliceBuffer(e.wire)}, nil
	}
	return c.std.Marshal(v)
}

func (c codec) Unmarshal(data mem.BufferSlice, v any) error {
	if n := data.Len(); c.max > 0 && n > c.max {
		err := tooLargeError{n, c.max}
		switch v := v.(type) {
		case *unaryRequest:
			v.err = err
		case *arrivedRequest:
			// Its robot, client sequence and session id, read past
			// the sample: the request is not copied.
			tooLargeRequest(data, &v.IngestRequest)
			v.malformed = err
		default:
			// A service not registered through checkedServiceDesc:
			// grpc-go answers INTERNAL, with these words.
			return err
		}
		return nil
	}
	if u, ok := v.(*unaryRequest); ok {
		c.decodeUnary(data, u)
		return nil
	}
	r, ok := v.(*arrivedRequest)
	if !ok {
		return c.std.Unmarshal(data, v)
	}
	b := r.slab.take(data.Len())
	data.CopyTo(b)
	r.size = len(b)
	if r.dec == nil || !decodeRequest(r.dec, b, &r.IngestRequest) {
		r.IngestRequest.Reset()
		if err := proto.Unmarshal(b, &r.IngestRequest); err != nil {
			// Not an IngestRequest (a string that is not UTF-8, a
			// field cut short): answered as its own verdict, as a bad
			// sample is, so that the stream goes on. An error here
			// ended the whole stream with INTERNAL.
			r.IngestRequest.Reset()
			r.ClientSequence, r.malformed = clientSequenceOf(b), err
			return nil
		}
	}
	r.wire = b
	return nil
}

// tooLargeRequest sets req, reset, to the robot's name, the client
// sequence and the session id of an encoded IngestRequest too large to
// take, read from its top-level fields as a decoder keeps them (the last
// of each), the sample skipped over without being copied: the refusal
// answers its client sequence, and a retry of a request taken before is
// answered with its first verdict (retriedTooLarge). A name or an id past
// headerStringBytes or not UTF-8 is left out; so is what follows a field
// that does not parse.
func tooLargeRequest(data mem.BufferSlice, req *pb.IngestRequest) {
	req.Reset()
	rd := data.Reader()
	defer rd.Close()
	for rd.Remaining() > 0 {
		tag, err := binary.ReadUvarint(rd)
		if err != nil || tag>>3 == 0 || tag>>3 > math.MaxInt32 {
			return
		}
		num, typ := protowire.DecodeTag(tag)
		skip := 0
		switch typ {
		case protowire.VarintType:
			v, err := binary.ReadUvarint(rd)
			if err != nil {
				return
			}
			if num == clientSequenceField {
				req.ClientSequence = v
			}
		case protowire.Fixed32Type:
			skip = 4
		case protowire.Fixed64Type:
			skip = 8
		case protowire.BytesType:
			n, err := binary.ReadUvarint(rd)
			if err != nil || n > uint64(rd.Remaining()) {
				return
			}
			skip = int(n)
			if num != robotField && num != sessionIDField {
				break
			}
			v := "" // too long to be a robot's or a session's, or not UTF-8
			if n <= headerStringBytes {
				b := make([]byte, n)
				if _, err := io.ReadFull(rd, b); err != nil {
					return
				}
				if skip = 0; utf8.Valid(b) {
					v = string(b)
				}
			}
			if num == robotField {
				req.Robot = v
			} else {
				req.SessionId = v
			}
		default:
			return
		}
		if skip > 0 {
			if k, err := rd.Discard(skip); err != nil || k != skip {
				return
			}
		}
	}
}

// requestDecoder is one ingest stream's decoder of requests by hand: its
// samples' decoder, and the robot's name and the session id of its last
// request, which the next ones repeat (kept, they cost no allocation).
type requestDecoder struct {
	samples        journal.SampleDecoder
	robot, session string
}

// decodeRequest sets req, a zero IngestRequest, to the request encoded in
// b, its sample decoded by dec, and reports whether it could. Whatever dec
// leaves to proto.Unmarshal, and a field given twice, a field it does not
// know, a wire type other than the field's or a string that is not UTF-8,
// it leaves to proto.Unmarshal too (false; req may then hold part of the
// request), so that a request means the same whichever decoder read it
// (FuzzDecodeRequest).
func decodeRequest(dec *requestDecoder, b []byte, req *pb.IngestRequest) bool {
	var seen uint32
	for len(b) > 0 {
		// Field 2 (client sequence) is a varint, the others
		// length-delimited.
		num, v, p, rest, ok := journal.NextField(b, &seen, 4, 1<<1|1<<3|1<<4)
		if !ok {
			return false
		}
		b = rest
		switch num {
		case 2:
			req.ClientSequence = v
		case 1:
			if req.Robot, ok = keep(&dec.robot, p); !ok {
				return false
			}
		case 4:
			if req.SessionId, ok = keep(&dec.session, p); !ok {
				return false
			}
		default:
			s, ok := dec.samples.Decode(p)
			if !ok {
				return false
			}
			req.Sample = s
		}
	}
	return true
}

// keep returns p as a string: the one kept in *last when p holds the same
// bytes (no allocation, and it was checked when kept), otherwise p's,
// kept in its place. ok is false when p is not UTF-8, which proto.Unmarshal
// refuses in a string field: the caller leaves the request to it.
func keep(last *string, p []byte) (s string, ok bool) {
	if string(p) == *last {
		return *last, true
	}
	if !utf8.Valid(p) {
		return "", false
	}
	*last = string(p)
	return *last, true
}

// arrivedRequest is an ingest request and, under codec, the bytes it
// arrived as. It is a proto.Message through the embedded request, so the
// standard codec decodes it too (and leaves wire nil).
type arrivedRequest struct {
	pb.IngestRequest
	wire []byte
	// malformed, when set, is why the bytes are not an IngestRequest, or
	// a tooLargeError (only ClientSequence is set then): the request is
	// refused, naming it.
	malformed error
	slab      *slab
	// dec, when set, decodes the common samples by hand (decodeRequest).
	dec *requestDecoder
	// arrived is when it was received (zero until ingestStream sets it
	// for a request that came without a stream).
	arrived time.Time
	// size is the length of the bytes the codec copied it into (0: none
	// were: a request too large, or another codec's).
	size int
	// charged is what its stream charged the server's budget for it
	// (inbox.put, pendingBudget).
	charged int64
}

// encodedResponse is a verdict and, when it was journaled, its encoding;
// codec sends the encoding, the standard codec encodes the message.
type encodedResponse struct {
	pb.IngestResponse
	wire []byte
}

// slab hands out pieces of large buffers for arriving requests and for
// encoded verdicts, one allocation per many of them. A piece is never
// written again once handed out; a buffer is freed when nothing refers to
// a piece of it any more.
//
// The robots' sessions keep encoded verdicts, so a verdict slab's buffers
// live as long as one of their verdicts is remembered: each ingest stream
// has its own (the verdicts of its robots, not of other streams), starting
// at verdictSlabStart bytes and doubling up to slabBytes, so that a short
// stream holds little more than its verdicts.
type slab struct {
	buf  []byte
	next int // the size of the next buffer (0: slabBytes)
}

const (
	slabBytes        = 64 << 10
	verdictSlabStart = 64
)

func (s *slab) newBuffer(n int) {
	size := s.next
	if size == 0 {
		size = slabBytes
	}
	s.buf = make([]byte, 0, max(size, n))
	s.next = min(2*size, slabBytes)
}

func (s *slab) take(n int) []byte {
	if s == nil {
		return make([]byte, n)
	}
	if cap(s.buf)-len(s.buf) < n {
		s.newBuffer(n)
	}
	b := s.buf[len(s.buf) : len(s.buf)+n : len(s.buf)+n]
	s.buf = s.buf[:len(s.buf)+n]
	return b
}

// marshal returns m's encoding as a piece of the slab.
func (s *slab) marshal(m proto.Message) ([]byte, error) {
	b := s.take(proto.Size(m))
	// The sizes Size cached are those of m as it is.
	enc, err := (proto.MarshalOptions{UseCachedSize: true}).MarshalAppend(b[:0], m)
	if err != nil {
		return nil, err
	}
	if len(enc) != len(b) {
		return nil, fmt.Errorf("encoding took %d bytes, its size was %d", len(enc), len(b))
	}
	return b, nil
}
