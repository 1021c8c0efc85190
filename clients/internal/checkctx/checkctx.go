// Package checkctx is a context for tests of interruption: it is cancelled
// at the n-th call of its Err, so that work that checks it as it goes is
// interrupted at a point of the work, whatever the speed of the machine,
// and it counts the calls.
package checkctx

import (
	"context"
	"sync/atomic"
)

// Context is a context cancelled at the n-th call of its Err.
type Context struct {
	context.Context
	cancel context.CancelFunc
	n      int64
	checks atomic.Int64
}

// CancelAfter returns a Context cancelled at the n-th call of its Err
// (never, for n below 1).
func CancelAfter(n int64) *Context {
	ctx, cancel := context.WithCancel(context.Background())
	return &Context{Context: ctx, cancel: cancel, n: n}
}

// Err counts the call, cancels the context at the n-th, and returns the
// context's error.
func (c *Context) Err() error {
	if c.checks.Add(1) == c.n {
		c.cancel()
	}
	return c.Context.Err()
}

// Checks returns the calls of Err so far.
func (c *Context) Checks() int64 { return c.checks.Load() }
