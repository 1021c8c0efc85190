package server

import (
	"context"
	"sync"
	"sync/atomic"
	"unsafe"

	"google.golang.org/protobuf/proto"
)

// pendingBudget bounds the bytes of the ingest requests that every stream of
// a server has received and not yet taken (Limits.MaxPendingBytes). A
// stream's receiver, before it receives one more request, waits while the
// bound is spent and the stream itself holds requests not taken: its
// client's sends then block through gRPC's flow control, and nothing is
// refused or lost. A stream that holds none may always receive one, so
// that no stream waits on the others forever (a stream whose taker waits
// on its robot's lock keeps what it holds until the robot is free, and
// the others go on, one request at a time each while the bound is spent):
// the bytes held stay below the bound plus one request per stream.
//
// The bytes are charged when a request was received (put) and released
// when its batch was taken or its stream ended (inbox.release, close).
type pendingBudget struct {
	max  int64
	used atomic.Int64
	// peak is the most used has been (tests).
	peak atomic.Int64
	// waiting counts the receivers waiting; a release that leaves used
	// below max wakes them when there are any.
	waiting atomic.Int64
	mu      sync.Mutex    // protects freed
	freed   chan struct{} // closed to wake the waiting receivers
	// waited counts the waits, for Metrics.
	waited func()
}

// requestOverhead is charged for each request besides its encoding: its
// arrivedRequest, which holds the request decoded.
const requestOverhead = int64(unsafe.Sizeof(arrivedRequest{}))

// chargeOf is what a received request is charged: its encoding, as the
// codec copied it, and its arrivedRequest. A request received by another
// codec (a Server registered without ServiceOptions) is charged its
// encoded size.
func chargeOf(r *arrivedRequest) int64 {
	n := int64(r.size)
	if n == 0 && r.wire == nil && r.malformed == nil {
		n = int64(proto.Size(&r.IngestRequest))
	}
	return requestOverhead + n
}

// charge adds n bytes.
func (g *pendingBudget) charge(n int64) {
	if u := g.used.Add(n); u > g.peak.Load() {
		for p := g.peak.Load(); u > p && !g.peak.CompareAndSwap(p, u); p = g.peak.Load() {
		}
	}
}

// release gives back n bytes, waking the waiting receivers if the bound is
// no longer spent.
func (g *pendingBudget) release(n int64) {
	if n == 0 {
		return
	}
	// used before waiting, as wait registers in waiting before reading
	// used: one of the two sees the other.
	if g.used.Add(-n) < g.max && g.waiting.Load() > 0 {
		g.mu.Lock()
		if g.freed != nil {
			close(g.freed)
			g.freed = nil
		}
		g.mu.Unlock()
	}
}

// spent reports whether the bound is spent: the receiver then asks wait.
func (g *pendingBudget) spent() bool { return g.used.Load() >= g.max }

// wait waits until the bound is no longer spent or the stream's inbox
// holds nothing (its drained signal), and returns nil; or until the
// stream's context ends or stop is closed, and returns why.
func (g *pendingBudget) wait(ctx context.Context, in *inbox, stop <-chan struct{}) error {
	counted := false
	for {
		g.mu.Lock()
		g.waiting.Add(1)
		if g.freed == nil {
			g.freed = make(chan struct{})
		}
		freed := g.freed
		free := g.used.Load() < g.max || in.held.Load() == 0
		g.mu.Unlock()
		if free {
			g.waiting.Add(-1)
			return nil
		}
		if !counted && g.waited != nil {
			g.waited()
			counted = true
		}
		var err error
		select {
		case <-freed:
		case <-in.drained:
		case <-ctx.Done():
			err = ctx.Err()
		case <-stop:
			err = errStopping
		}
		g.waiting.Add(-1)
		if err != nil {
			return err
		}
	}
}
