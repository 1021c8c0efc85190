package server

import (
	"fmt"

	"google.golang.org/grpc"

	"reckon.example/server/journal"
)

// DefaultMaxMessageBytes is the largest message ServiceOptions accepts
// unless told otherwise (64 KiB).
const DefaultMaxMessageBytes = 64 << 10

// ServiceOptions returns the gRPC server options the service relies on:
// its codec (ingest keeps the bytes a sample arrived as for the journal and
// sends verdicts as the bytes it journaled, codec.go) and a bound of
// maxMessageBytes on one received message (DefaultMaxMessageBytes if 0 or
// less). The bound may be at most half of journal.MaxRecordBytes, so that a
// sample always fits its journal record: otherwise taking it would stop the
// robot, whose input could not be journaled.
//
// The codec refuses a message past the bound, naming its size and the
// bound: on an ingest stream as that request's verdict, the stream going on
// (RESOURCE_EXHAUSTED, REFUSAL_LIMIT); any other call with
// RESOURCE_EXHAUSTED (a service registered without Register or
// RegisterChecked gets grpc-go's INTERNAL, naming the size and the bound
// in the codec's words). gRPC's own limit, past which it ends the whole
// stream (every request in flight after it unanswered), is
// HardMessageBytes(maxMessageBytes): a stream holds at most one message
// of that size at a time, which the codec reads, so memory stays bounded.
func ServiceOptions(maxMessageBytes int) ([]grpc.ServerOption, error) {
	if maxMessageBytes <= 0 {
		maxMessageBytes = DefaultMaxMessageBytes
	}
	if limit := journal.MaxRecordBytes / 2; maxMessageBytes > limit {
		return nil, fmt.Errorf("max message bytes %d exceeds %d, half the journal's record limit", maxMessageBytes, limit)
	}
	c := newCodec()
	c.max = maxMessageBytes
	return []grpc.ServerOption{grpc.MaxRecvMsgSize(HardMessageBytes(maxMessageBytes)), grpc.ForceServerCodecV2(c)}, nil
}

// HardMessageBytes is the size past which gRPC itself refuses a message
// under ServiceOptions(maxMessageBytes), ending its stream: twice the
// bound. A message between the two is read whole and refused alone.
func HardMessageBytes(maxMessageBytes int) int { return 2 * maxMessageBytes }
