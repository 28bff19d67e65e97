package cache

import (
	"context"
	"errors"
	"time"
)

// ErrClosed is returned by a Store used after Close.
var ErrClosed = errors.New("cache: store is closed")

// Store is a durable key/value store for cached answers.
//
// Keys are the hex digests made by Key; values are opaque bytes. A Store
// compresses values itself when that pays. Get reports found=false, not an
// error, for a missing or expired key. Put with ttl <= 0 stores an entry that
// only the size cap can evict. Implementations are safe for concurrent use and
// a Put that returned nil survives a crash of the process.
type Store interface {
	Get(ctx context.Context, key string) (value []byte, found bool, err error)
	Put(ctx context.Context, key string, value []byte, ttl time.Duration) error
	Delete(ctx context.Context, key string) error
	Close() error
}
