package server

import (
	"context"
	"sync"
)

// inbox hands the requests of one ingest stream from the goroutine that
// receives them to the one that takes them, a batch at a time: the receiver
// appends under a mutex and the taker swaps the whole batch out, so a
// sample costs no channel operation of its own. At most maxBatch requests
// wait; the receiver then blocks, and gRPC flow control holds the client
// back.
type inbox struct {
	mu      sync.Mutex
	pending []*arrivedRequest
	ended   error         // why receiving ended, once it has
	ready   chan struct{} // capacity 1: something to take, or the end
	room    chan struct{} // capacity 1: the pending batch was taken
}

func newInbox() *inbox {
	return &inbox{pending: make([]*arrivedRequest, 0, maxBatch), ready: make(chan struct{}, 1), room: make(chan struct{}, 1)}
}

func signal(c chan struct{}) {
	select {
	case c <- struct{}{}:
	default:
	}
}

// put adds a request, waiting while a full batch waits to be taken.
func (b *inbox) put(ctx context.Context, r *arrivedRequest) error {
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
	b.pending = append(b.pending, r)
	first := len(b.pending) == 1
	b.mu.Unlock()
	if first {
		signal(b.ready)
	}
	return nil
}

// end records why receiving ended (io.EOF when the client closed).
func (b *inbox) end(err error) {
	b.mu.Lock()
	b.ended = err
	b.mu.Unlock()
	signal(b.ready)
}

// take waits for requests and returns every one waiting, in arrival order;
// once they are all taken after the end, it returns the end's error. prev,
// the batch take returned last, is reused: the caller is done with it. A
// signal on wake (nil: none) returns an empty batch, so that the caller
// can send what else it has.
func (b *inbox) take(ctx context.Context, prev []*arrivedRequest, wake <-chan struct{}) ([]*arrivedRequest, error) {
	clear(prev)
	for {
		b.mu.Lock()
		if len(b.pending) > 0 {
			batch := b.pending
			b.pending = prev[:0]
			b.mu.Unlock()
			signal(b.room)
			return batch, nil
		}
		if err := b.ended; err != nil {
			b.mu.Unlock()
			return nil, err
		}
		b.mu.Unlock()
		select {
		case <-b.ready:
		case <-wake:
			return prev[:0], nil
		case <-ctx.Done():
			return nil, ctx.Err()
		}
	}
}
