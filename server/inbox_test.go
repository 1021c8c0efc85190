package server

import (
	"context"
	"errors"
	"io"
	"testing"
	"time"
)

// TestInbox: every request put is taken once, in order, in batches of at
// most maxBatch, and the end comes after the last of them.
func TestInbox(t *testing.T) {
	ctx := context.Background()
	b := newInbox(&pendingBudget{max: 1 << 62})
	const n = 20000
	go func() {
		for i := 0; i < n; i++ {
			r := &arrivedRequest{}
			r.ClientSequence = uint64(i)
			if err := b.put(ctx, r, true); err != nil {
				t.Error(err)
				return
			}
		}
		b.end(io.EOF)
	}()
	var batch []*arrivedRequest
	next := uint64(0)
	for {
		if err := b.wait(ctx, nil, nil); err != nil {
			if err != io.EOF {
				t.Fatal(err)
			}
			break
		}
		batch = b.takeNow(batch)
		if len(batch) == 0 || len(batch) > maxBatch {
			t.Fatalf("batch of %d", len(batch))
		}
		for _, r := range batch {
			if r.ClientSequence != next {
				t.Fatalf("took %d, want %d", r.ClientSequence, next)
			}
			next++
		}
	}
	if next != n {
		t.Fatalf("took %d of %d", next, n)
	}
}

// TestInboxCancel: a receiver blocked on a full inbox and a taker waiting
// on an empty one both return when the stream's context ends.
func TestInboxCancel(t *testing.T) {
	ctx, cancel := context.WithCancel(context.Background())
	full := newInbox(&pendingBudget{max: 1 << 62})
	for i := 0; i < maxBatch; i++ {
		if err := full.put(ctx, &arrivedRequest{}, true); err != nil {
			t.Fatal(err)
		}
	}
	putErr, takeErr := make(chan error), make(chan error)
	go func() { putErr <- full.put(ctx, &arrivedRequest{}, true) }()
	go func() { takeErr <- newInbox(&pendingBudget{max: 1 << 62}).wait(ctx, nil, nil) }()
	time.Sleep(10 * time.Millisecond)
	cancel()
	for _, c := range []chan error{putErr, takeErr} {
		if err := <-c; !errors.Is(err, context.Canceled) {
			t.Errorf("err = %v, want canceled", err)
		}
	}
}
