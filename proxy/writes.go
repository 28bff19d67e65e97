package proxy

import (
	"context"
	"errors"
	"sync"
	"time"

	"github.com/stintlab/stint/cache"
)

// maxPendingWrites bounds the store writes running behind answers; past it a
// request writes before it answers, so a slow disk slows clients instead of
// piling up memory.
const maxPendingWrites = 256

// writeTimeout bounds one store write.
const writeTimeout = 30 * time.Second

// writeBehind stores answers after they have been sent, so the client does
// not wait for the store's fsync. Until a write has landed its record is
// served from memory, so a repeat arriving meanwhile is still a hit.
type writeBehind struct {
	store cache.Store
	bg    *background

	mu      sync.Mutex // guards pending
	pending map[string][]byte
}

func newWriteBehind(store cache.Store) *writeBehind {
	return &writeBehind{store: store, bg: newBackground(maxPendingWrites), pending: map[string][]byte{}}
}

// staleGetter is a store that can stand in for a failing store behind it
// with a copy it holds (cache.Hot with StaleIfError).
type staleGetter interface {
	// GetStale is Get that, when it serves such a copy, returns it with
	// found and stale set and the failure as err.
	GetStale(ctx context.Context, key string) (value []byte, found, stale bool, err error)
}

// get returns the record for key: one still being written, else the
// store's. When the store failed but served a copy it held, get returns
// that copy, found, and the failure: the caller may use the record and
// should report the failure.
func (wb *writeBehind) get(ctx context.Context, key string) ([]byte, bool, error) {
	wb.mu.Lock()
	b, ok := wb.pending[key]
	wb.mu.Unlock()
	if ok {
		return b, true, nil
	}
	if sg, ok := wb.store.(staleGetter); ok {
		v, found, stale, err := sg.GetStale(ctx, key)
		return v, found || stale, err
	}
	return wb.store.Get(ctx, key)
}

// put schedules value to be stored under key; onErr reports a failed write.
func (wb *writeBehind) put(key string, value []byte, ttl time.Duration, onErr func(error)) {
	wb.mu.Lock()
	wb.pending[key] = value
	wb.mu.Unlock()
	write := func() {
		ctx, cancel := context.WithTimeout(context.Background(), writeTimeout)
		defer cancel()
		err := wb.store.Put(ctx, key, value, ttl)
		wb.mu.Lock()
		if cur, ok := wb.pending[key]; ok && len(cur) > 0 && len(value) > 0 && &cur[0] == &value[0] {
			delete(wb.pending, key)
		}
		wb.mu.Unlock()
		if err != nil && !errors.Is(err, cache.ErrTooLarge) {
			onErr(err)
		}
	}
	wb.bg.run(write)
}

// inFlight reports how many writes have not landed yet.
func (wb *writeBehind) inFlight() int {
	wb.mu.Lock()
	defer wb.mu.Unlock()
	return len(wb.pending)
}

// wait blocks until every scheduled write has finished or ctx ends.
func (wb *writeBehind) wait(ctx context.Context) error { return wb.bg.wait(ctx) }

// background runs work after the answer is sent, at most a bound at once;
// past the bound the caller runs it itself, so a slow disk or journal slows
// clients instead of piling up goroutines.
type background struct {
	sem chan struct{}
	wg  sync.WaitGroup
}

func newBackground(bound int) *background {
	return &background{sem: make(chan struct{}, bound)}
}

func (b *background) run(fn func()) {
	b.wg.Add(1)
	select {
	case b.sem <- struct{}{}:
		go func() {
			defer b.wg.Done()
			defer func() { <-b.sem }()
			fn()
		}()
	default:
		defer b.wg.Done()
		fn()
	}
}

// wait blocks until every task has finished or ctx ends.
func (b *background) wait(ctx context.Context) error {
	done := make(chan struct{})
	go func() { b.wg.Wait(); close(done) }()
	select {
	case <-done:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}
