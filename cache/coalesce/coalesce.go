// Package coalesce merges identical concurrent calls into one.
//
// It differs from golang.org/x/sync/singleflight in two ways the proxy needs:
// waiters honour their own context (a client that gives up stops waiting
// without disturbing the call), and the call runs in the first caller's
// goroutine, so that caller can stream the answer to its client while the
// others wait for the finished result.
package coalesce

import (
	"context"
	"fmt"
	"sync"
)

// Group runs at most one call per key at a time. The zero value is ready to
// use; a Group is safe for concurrent use and must not be copied.
type Group[T any] struct {
	mu    sync.Mutex // guards calls
	calls map[string]*call[T]
}

type call[T any] struct {
	done    chan struct{}
	val     T
	err     error
	waiters int
}

// Do runs fn for key unless a call for key is already running, in which case
// it waits for that call's result (shared is then true) or for ctx to end.
// fn runs in the caller's goroutine and is not given ctx: a call that others
// may be waiting on should use a context of its own that one caller's
// cancellation does not end. A panic in fn reaches the waiters as an error and
// is re-raised in the caller.
func (g *Group[T]) Do(ctx context.Context, key string, fn func() (T, error)) (v T, shared bool, err error) {
	g.mu.Lock()
	if g.calls == nil {
		g.calls = make(map[string]*call[T])
	}
	if c, ok := g.calls[key]; ok {
		c.waiters++
		g.mu.Unlock()
		defer g.leave(c)
		select {
		case <-c.done:
			return c.val, true, c.err
		case <-ctx.Done():
			var zero T
			return zero, true, ctx.Err()
		}
	}
	c := &call[T]{done: make(chan struct{})}
	g.calls[key] = c
	g.mu.Unlock()

	finished := false
	defer func() {
		if !finished {
			c.err = fmt.Errorf("coalesce: call for %q panicked", key)
		}
		g.mu.Lock()
		delete(g.calls, key)
		g.mu.Unlock()
		close(c.done)
	}()
	c.val, c.err = fn()
	finished = true
	return c.val, false, c.err
}

func (g *Group[T]) leave(c *call[T]) {
	g.mu.Lock()
	c.waiters--
	g.mu.Unlock()
}

// Waiting reports how many callers are waiting on the running call for key.
func (g *Group[T]) Waiting(key string) int {
	g.mu.Lock()
	defer g.mu.Unlock()
	if c, ok := g.calls[key]; ok {
		return c.waiters
	}
	return 0
}

// TotalWaiting reports how many callers are waiting on any running call.
func (g *Group[T]) TotalWaiting() int {
	g.mu.Lock()
	defer g.mu.Unlock()
	n := 0
	for _, c := range g.calls {
		n += c.waiters
	}
	return n
}

// InFlight reports how many calls are running.
func (g *Group[T]) InFlight() int {
	g.mu.Lock()
	defer g.mu.Unlock()
	return len(g.calls)
}
