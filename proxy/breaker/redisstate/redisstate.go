// Package redisstate keeps circuit breaker state in Redis or a Redis
// Cluster, as the gobreaker.SharedDataStore behind a shared breaker
// (proxy/breaker), so every replica of the proxy sees one state per
// upstream.
//
// Keys are "<prefix>:breaker:{<breaker name>}:state", ":lock" and
// ":record" (the lock proxy/breaker holds while it records an outcome):
// the hash tag keeps one breaker's keys in one cluster slot. Every command is
// bounded by Options.Timeout (gobreaker's interface takes no context), so
// a dead Redis turns into a quick error, on which the breaker uses its
// local state. The lock is SET NX PX with a random token, released by a
// compare-and-delete script, and it expires on its own after LockTTL if
// its holder dies. A breaker takes it only to record an outcome (a few
// round trips after each upstream call), never around the call itself.
// gobreaker retries a failed Lock every 500 ms for up to 5 s, so a Redis
// that dies in the middle of a record can hold that one record up to 5 s;
// the breaker then keeps to local state for a while (breaker.StoreRetry).
//
// A Redis Cluster failover can lose a breaker's last state change
// (replication is asynchronous): the shared state is then an older one (say,
// closed again, or still open) until the next outcome is recorded, which
// costs at most a few calls to an upstream that is down or a few refusals
// of one that is up; no budget depends on it. The lock's key may be lost
// too, which lets a second holder in at most once, as an expired lock does.
package redisstate

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/sony/gobreaker/v2"
)

// Defaults for the zero fields of Options.
const (
	DefaultPrefix   = "stint"
	DefaultTimeout  = 250 * time.Millisecond
	DefaultLockTTL  = 2 * time.Second
	DefaultLockWait = time.Second
	DefaultStateTTL = 24 * time.Hour
)

// Options configure a Store. Zero fields mean the defaults.
type Options struct {
	// Prefix starts every key; it must not hold '{' or '}'.
	Prefix string
	// Timeout bounds each Redis command.
	Timeout time.Duration
	// LockTTL is how long a lock lives if its holder never releases it.
	LockTTL time.Duration
	// LockWait is how long Lock waits for a lock another holder has.
	LockWait time.Duration
	// StateTTL is how long a breaker's state outlives its last update, so
	// upstreams that left the config do not stay in Redis for ever.
	StateTTL time.Duration
}

// ErrLockBusy is Lock's error when the lock stayed taken for LockWait.
var ErrLockBusy = errors.New("redisstate: breaker lock is busy")

// unreachable is what GetData returns, with the error, when Redis failed:
// gobreaker v2.4.0's getSharedState checks for empty data before it checks
// the error, so empty data would read an outage as "no state yet" and
// overwrite the shared state with a fresh closed one.
const unreachable = "redis unreachable"

// Store is a gobreaker.SharedDataStore on Redis. It is safe for concurrent
// use; one Store serves any number of breakers.
type Store struct {
	c     redis.UniversalClient
	o     Options
	token string // identifies this Store's locks

	mu    sync.Mutex               // guards local
	local map[string]chan struct{} // one slot per lock key: in-process holders queue here, not on Redis
}

// New returns a Store on c; the caller owns c.
func New(c redis.UniversalClient, o Options) (*Store, error) {
	if strings.ContainsAny(o.Prefix, "{}") {
		return nil, errors.New("redisstate: prefix must not hold '{' or '}'")
	}
	if o.Prefix == "" {
		o.Prefix = DefaultPrefix
	}
	if o.Timeout <= 0 {
		o.Timeout = DefaultTimeout
	}
	if o.LockTTL <= 0 {
		o.LockTTL = DefaultLockTTL
	}
	if o.LockWait <= 0 {
		o.LockWait = DefaultLockWait
	}
	if o.StateTTL <= 0 {
		o.StateTTL = DefaultStateTTL
	}
	var tok [16]byte
	_, _ = rand.Read(tok[:])
	return &Store{c: c, o: o, token: hex.EncodeToString(tok[:]), local: map[string]chan struct{}{}}, nil
}

var _ gobreaker.SharedDataStore = (*Store)(nil)

// key maps the names a breaker uses ("gobreaker:mutex:NAME" and
// "gobreaker:state:NAME" from gobreaker, "gobreaker:record:NAME" from
// proxy/breaker) to hash-tagged keys of this Store.
func (s *Store) key(name string) string {
	kind, bname := "data", name
	for _, k := range []struct{ prefix, kind string }{
		{"gobreaker:mutex:", "lock"}, {"gobreaker:state:", "state"}, {"gobreaker:record:", "record"},
	} {
		if rest, ok := strings.CutPrefix(name, k.prefix); ok {
			kind, bname = k.kind, rest
			break
		}
	}
	bname = strings.NewReplacer("{", "%7B", "}", "%7D").Replace(bname)
	return s.o.Prefix + ":breaker:{" + bname + "}:" + kind
}

func (s *Store) ctx() (context.Context, context.CancelFunc) {
	return context.WithTimeout(context.Background(), s.o.Timeout)
}

func (s *Store) slot(key string) chan struct{} {
	s.mu.Lock()
	defer s.mu.Unlock()
	ch, ok := s.local[key]
	if !ok {
		ch = make(chan struct{}, 1)
		s.local[key] = ch
	}
	return ch
}

// Lock takes the named lock, waiting up to LockWait for it.
func (s *Store) Lock(name string) error {
	key := s.key(name)
	slot := s.slot(key)
	wait := time.NewTimer(s.o.LockWait)
	defer wait.Stop()
	select {
	case slot <- struct{}{}:
	case <-wait.C:
		return fmt.Errorf("%w: %s (held in this process)", ErrLockBusy, key)
	}
	pause := 2 * time.Millisecond
	for {
		ctx, cancel := s.ctx()
		ok, err := s.c.SetNX(ctx, key, s.token, s.o.LockTTL).Result()
		cancel()
		if err != nil {
			<-slot
			return fmt.Errorf("redisstate: lock %s: %w", key, err)
		}
		if ok {
			return nil
		}
		t := time.NewTimer(pause)
		select {
		case <-t.C:
		case <-wait.C:
			t.Stop()
			<-slot
			return fmt.Errorf("%w: %s", ErrLockBusy, key)
		}
		pause = min(pause*2, 50*time.Millisecond)
	}
}

// unlockScript deletes the lock only if this Store still holds it.
var unlockScript = redis.NewScript(`if redis.call("GET", KEYS[1]) == ARGV[1] then return redis.call("DEL", KEYS[1]) end return 0`)

// Unlock releases the named lock. If Redis fails the lock expires after
// LockTTL.
func (s *Store) Unlock(name string) error {
	key := s.key(name)
	ctx, cancel := s.ctx()
	defer cancel()
	err := unlockScript.Run(ctx, s.c, []string{key}, s.token).Err()
	select {
	case <-s.slot(key):
	default:
	}
	if err != nil {
		return fmt.Errorf("redisstate: unlock %s: %w", key, err)
	}
	return nil
}

// GetData returns the named state, nil when there is none.
func (s *Store) GetData(name string) ([]byte, error) {
	key := s.key(name)
	ctx, cancel := s.ctx()
	defer cancel()
	b, err := s.c.Get(ctx, key).Bytes()
	if errors.Is(err, redis.Nil) {
		return nil, nil
	}
	if err != nil {
		return []byte(unreachable), fmt.Errorf("redisstate: get %s: %w", key, err)
	}
	return b, nil
}

// SetData stores the named state for StateTTL.
func (s *Store) SetData(name string, data []byte) error {
	key := s.key(name)
	ctx, cancel := s.ctx()
	defer cancel()
	if err := s.c.Set(ctx, key, data, s.o.StateTTL).Err(); err != nil {
		return fmt.Errorf("redisstate: set %s: %w", key, err)
	}
	return nil
}
