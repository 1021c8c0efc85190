package server

import (
	"context"
	"errors"
	"sync"
	"sync/atomic"
)

// inbox hands the requests of one ingest stream from the goroutine that
// receives them to the one that takes them, a batch at a time: the receiver
// appends under a mutex and the taker swaps the whole batch out, so a
// sample costs no channel operation of its own. At most maxBatch requests
// wait; the receiver then blocks, and gRPC flow control holds the client
// back. The requests' bytes are charged to the server's budget
// (pendingBudget) from put until their batch was taken (release) or the
// stream ended (close).
type inbox struct {
	mu      sync.Mutex
	pending []*arrivedRequest
	ended   error         // why receiving ended, once it has
	closed  bool          // the stream ended: nothing more is charged
	ready   chan struct{} // capacity 1: something to take, or the end
	room    chan struct{} // capacity 1: the pending batch was taken
	// held is the bytes charged for the requests put and not yet
	// released: waiting, or in a batch being taken.
	held    atomic.Int64
	drained chan struct{} // capacity 1: held fell to 0
	budget  *pendingBudget
}

func newInbox(g *pendingBudget) *inbox {
	return &inbox{pending: make([]*arrivedRequest, 0, maxBatch), ready: make(chan struct{}, 1), room: make(chan struct{}, 1),
		drained: make(chan struct{}, 1), budget: g}
}

// errStreamEnded is put's error once the stream ended (close).
var errStreamEnded = errors.New("the ingest stream ended")

func signal(c chan struct{}) {
	select {
	case c <- struct{}{}:
	default:
	}
}

// put adds a request, waiting while a full batch waits to be taken. It
// signals the taker when wake says so and the request is the first waiting.
func (b *inbox) put(ctx context.Context, r *arrivedRequest, wake bool) error {
	b.mu.Lock()
	for len(b.pending) >= maxBatch {
		b.mu.Unlock()
		select {
		case <-b.room:
		case <-ctx.Done():
			return ctx.Err()
		}
		b.mu.Lock()
	}
	if b.closed {
		b.mu.Unlock()
		return errStreamEnded
	}
	r.charged = chargeOf(r)
	b.held.Add(r.charged)
	b.budget.charge(r.charged)
	b.pending = append(b.pending, r)
	first := len(b.pending) == 1
	b.mu.Unlock()
	if first && wake {
		signal(b.ready)
	}
	return nil
}

// end records why the stream ended: receiving did (io.EOF when the client
// closed), or sending failed on the receiving goroutine (ingestTurn).
func (b *inbox) end(err error) {
	b.mu.Lock()
	b.ended = err
	b.mu.Unlock()
	signal(b.ready)
}

// release gives back the bytes of a batch that takeNow returned, once it
// was taken, and drops what each request refers to: a request lives on in
// its stream's block of requests (receive) until the block's last is
// received, and it held its bytes' slab buffer, and its decoded fields,
// with it. Before, 512 streams of requests of nearly 64 KiB kept 1 GB of
// taken requests' buffers so (pprof of reckond under the probe that
// DEVELOPERS.md's limits section describes).
func (b *inbox) release(batch []*arrivedRequest) {
	var n int64
	for _, r := range batch {
		n += r.charged
		r.IngestRequest.Reset()
		r.wire, r.malformed, r.charged = nil, nil, 0
	}
	if n == 0 {
		return
	}
	if b.held.Add(-n) == 0 {
		signal(b.drained)
	}
	b.budget.release(n)
}

// close gives back the bytes of the requests never taken, once the
// stream's taking ended, and refuses those put after (errStreamEnded).
// A request put and not taken was never answered, so none is lost.
func (b *inbox) close() {
	b.mu.Lock()
	b.closed = true
	rest := b.pending
	b.pending = nil
	b.mu.Unlock()
	b.release(rest)
	clear(rest)
}

// takeNow returns every request waiting, in arrival order, without
// waiting (none: an empty batch). prev, the batch takeNow returned last,
// is reused: the caller is done with it.
func (b *inbox) takeNow(prev []*arrivedRequest) []*arrivedRequest {
	clear(prev)
	b.mu.Lock()
	if len(b.pending) == 0 {
		b.mu.Unlock()
		return prev[:0]
	}
	batch := b.pending
	b.pending = prev[:0]
	b.mu.Unlock()
	signal(b.room)
	return batch
}

// wait waits until requests wait to be taken, or a signal on wake (nil:
// none) comes, and returns nil; once receiving has ended and nothing waits,
// it returns the end's error, and once stop is closed, errStopping.
func (b *inbox) wait(ctx context.Context, wake, stop <-chan struct{}) error {
	for {
		select {
		case <-stop:
			// Before what waits: a client that keeps sending would
			// otherwise keep the stream going.
			return errStopping
		default:
		}
		b.mu.Lock()
		n, ended := len(b.pending), b.ended
		b.mu.Unlock()
		if n > 0 {
			return nil
		}
		if ended != nil {
			return ended
		}
		select {
		case <-b.ready:
		case <-wake:
			return nil
		case <-stop:
			return errStopping
		case <-ctx.Done():
			return ctx.Err()
		}
	}
}
