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
func ServiceOptions(maxMessageBytes int) ([]grpc.ServerOption, error) {
	if maxMessageBytes <= 0 {
		maxMessageBytes = DefaultMaxMessageBytes
	}
	if limit := journal.MaxRecordBytes / 2; maxMessageBytes > limit {
		return nil, fmt.Errorf("max message bytes %d exceeds %d, half the journal's record limit", maxMessageBytes, limit)
	}
	return []grpc.ServerOption{grpc.MaxRecvMsgSize(maxMessageBytes), grpc.ForceServerCodecV2(newCodec())}, nil
}
