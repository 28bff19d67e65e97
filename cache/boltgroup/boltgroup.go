// Package boltgroup commits bbolt writes in shared transactions without
// making a lone writer wait: the group commit the proxy's ledger and run
// journal share, so the writes of one file go through one committer.
package boltgroup

import (
	"errors"
	"sync"

	"go.etcd.io/bbolt"
)

// Committer runs write functions in shared transactions: while one
// transaction commits (and syncs the file), the functions that arrive
// queue up and then commit together in the next one. A lone writer commits
// at once, so unlike bbolt's DB.Batch nobody waits for a timer; under
// concurrency, one fsync serves everyone who queued during the last.
//
// Written here rather than taken from bbolt because DB.Batch delays every
// lone caller by MaxBatchDelay, which for a proxy answering one call at a
// time tripled the latency of each budgeted miss.
type Committer struct {
	db *bbolt.DB

	mu      sync.Mutex // guards queue and running
	queue   []pendingWrite
	running bool // a commit loop is draining the queue
}

type pendingWrite struct {
	fn   func(*bbolt.Tx) error
	done chan error
}

// failedWrite marks the function that failed a shared transaction.
type failedWrite struct {
	index int
	err   error
}

func (f *failedWrite) Error() string { return f.err.Error() }

// New returns a Committer for db.
func New(db *bbolt.DB) *Committer { return &Committer{db: db} }

// Update runs fn in a read-write transaction, shared with other callers'
// functions when they overlap. fn may run more than once (after another
// function failed the shared transaction, each runs again alone), so it
// must start from scratch each time. It returns fn's error or the commit's.
func (g *Committer) Update(fn func(*bbolt.Tx) error) error {
	p := pendingWrite{fn: fn, done: make(chan error, 1)}
	g.mu.Lock()
	g.queue = append(g.queue, p)
	if !g.running {
		g.running = true
		go g.loop()
	}
	g.mu.Unlock()
	return <-p.done
}

// loop commits queued functions until the queue is empty.
func (g *Committer) loop() {
	for {
		g.mu.Lock()
		batch := g.queue
		g.queue = nil
		if len(batch) == 0 {
			g.running = false
			g.mu.Unlock()
			return
		}
		g.mu.Unlock()
		g.commit(batch)
	}
}

func (g *Committer) commit(batch []pendingWrite) {
	err := g.db.Update(func(tx *bbolt.Tx) error {
		for i, p := range batch {
			if err := p.fn(tx); err != nil {
				return &failedWrite{index: i, err: err}
			}
		}
		return nil
	})
	var fw *failedWrite
	switch {
	case err == nil || len(batch) == 1:
		if errors.As(err, &fw) {
			err = fw.err
		}
		for _, p := range batch {
			p.done <- err
		}
	default:
		// One function (or the commit) failed the whole transaction:
		// run each alone so that only the failing one reports an error.
		for _, p := range batch {
			p.done <- g.db.Update(p.fn)
		}
	}
}
