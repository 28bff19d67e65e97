// Package redisstore is a cache.Store on Redis or Redis Cluster
// (github.com/redis/go-redis/v9, any redis.UniversalClient), so that several
// stint serve replicas share one cache, and a lease (Claim) with which they
// make one upstream call for a miss that several of them see at once.
//
// # Keys
//
// An entry of key K lives at "<prefix>:cache:{K}:v"; its lease at
// "<prefix>:cache:{K}:l" and the lease's release notice goes out on the
// shard channel "<prefix>:cache:{K}:n". The braces are a hash tag: on a
// cluster the entry, its lease and its channel are in one slot, on one node.
// The prefix must not hold '{' or '}'.
//
// # Values
//
// A value is stored with a 14-byte header (format version, flags, expiry
// time, CRC-32C of the value) and, when that pays, S2-compressed (the
// embedded store's default codec, cheap on the cores that answer requests;
// see Options.CompressMin). A damaged or foreign value
// reads as an error wrapping ErrCorrupt, never as a wrong answer. A TTL is
// set with SET ... PX, so Redis itself drops expired entries.
//
// # Memory policy
//
// Redis keeps everything in memory. Give it a bound and an eviction policy,
// or it refuses writes once full ("OOM command not allowed"), which the
// proxy treats as a store failure (answers are served, not cached):
//
//	maxmemory 4gb
//	maxmemory-policy allkeys-lru    # Redis holds only stint's cache: evict any key
//	maxmemory-policy volatile-lru   # Redis also holds budgets and journals:
//	                                # evict only keys with a TTL (set cache.ttl)
//
// With volatile-lru only entries with a TTL can be evicted, so give the cache
// a TTL (cache.ttl in stint's config); budgets, spend and run journals never
// have one and are never evicted. allkeys-lru on a Redis that also holds
// budgets can evict a ledger: do not use it there.
//
// # Failures
//
// Every call is bounded by Options.Timeout (through its context: create the
// client with ContextTimeoutEnabled, or its ReadTimeout and WriteTimeout
// bound the commands instead). A call that fails because Redis could not be
// reached or did not answer in time fails with an error wrapping
// ErrUnavailable, and for Options.Cooldown afterwards calls to the same node
// fail at once the same way instead of waiting on a dead server again,
// except for one probe call per tenth of the cooldown. A call that reaches
// the node ends its cooldown, so the store recovers by itself within a
// tenth of the cooldown of Redis answering again.
//
// On a Redis Cluster the node is the primary of the key's slot in the
// client's slot map (go-redis's MasterForKey): a dead primary cools down
// only the keys of its slots, and the other primaries' keys are served as
// usual. Once go-redis has reloaded its slot map after a failover
// (ClusterOptions.ClusterStateReloadInterval, or ReloadState), the keys go
// to the promoted replica, which has no cooldown of its own.
//
// # Ownership
//
// The Store does not own the client: Close stops the store's own work
// (lease renewals) and makes later calls fail with cache.ErrClosed, but
// leaves the client open for the ledgers and journals that share it. The
// caller closes the client after the store.
package redisstore

import (
	"context"
	"errors"
	"fmt"
	"net"
	"sync"
	"sync/atomic"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/stintlab/stint/cache"
)

// Defaults for zero Options fields.
const (
	// DefaultPrefix starts every key when Options.Prefix is empty.
	DefaultPrefix = "stint"
	// DefaultTimeout bounds one call when Options.Timeout is zero.
	DefaultTimeout = time.Second
	// DefaultCooldown is Options.Cooldown's default.
	DefaultCooldown = time.Second
	// DefaultCompressMin is the smallest value compressed when
	// Options.CompressMin is zero (measured for the embedded store:
	// smaller completion-shaped values do not shrink).
	DefaultCompressMin = 256
	// DefaultMaxEntryBytes is Options.MaxEntryBytes's default, well under
	// Redis's 512 MiB limit of one value.
	DefaultMaxEntryBytes = 64 << 20
	// DefaultLeaseTTL is Options.LeaseTTL's default.
	DefaultLeaseTTL = 10 * time.Second
	// DefaultLeasePoll is Options.LeasePoll's default.
	DefaultLeasePoll = 250 * time.Millisecond
)

// Errors callers can act on, wrapped by the errors this package returns.
var (
	// ErrUnavailable reports that Redis could not be reached or did not
	// answer within the timeout (or did so recently, see Options.Cooldown).
	ErrUnavailable = errors.New("redisstore: redis unavailable")
	// ErrCorrupt reports a stored value that is not a valid entry.
	ErrCorrupt = errors.New("redisstore: stored value is corrupt")
)

// Options configure a Store. A field's zero value means its default; where
// it says so, -1 turns the feature off.
type Options struct {
	// Prefix starts every key; it must not hold '{' or '}'. Empty means
	// DefaultPrefix.
	Prefix string
	// Timeout bounds each call (each Redis round trip of it). 0 means
	// DefaultTimeout; -1 means only the caller's context bounds it.
	Timeout time.Duration
	// Cooldown is how long, after a call found its node unavailable
	// (on a cluster: the primary of its key's slot, see the package doc),
	// calls to that node fail at once with ErrUnavailable instead of
	// trying, but for one probe call per tenth of it. 0 means
	// DefaultCooldown; -1 means always try.
	Cooldown time.Duration
	// CompressMin is the smallest value length that is S2-compressed;
	// values that do not shrink are stored as they are. 0 means
	// DefaultCompressMin; -1 means never compress.
	CompressMin int
	// MaxEntryBytes is the largest stored (encoded) entry; a Put of a
	// larger one fails with cache.ErrTooLarge. 0 means
	// DefaultMaxEntryBytes; -1 means no limit but Redis's own.
	MaxEntryBytes int
	// LeaseTTL is how long a lease taken with Claim lives without being
	// renewed; its holder renews it every LeaseTTL/3 until it releases it,
	// so LeaseTTL bounds how long others wait on a holder that died. 0
	// means DefaultLeaseTTL.
	LeaseTTL time.Duration
	// LeasePoll is how often a waiter in Claim checks the lease besides
	// listening for its release notice (which a network blip can lose).
	// 0 means DefaultLeasePoll.
	LeasePoll time.Duration
	// Now is the clock for the expiry times GetWithExpiry reports and the
	// cooldown. nil means time.Now.
	Now func() time.Time
}

// Store is a cache.Store on Redis. It is safe for concurrent use, and any
// number of Stores in any number of processes may share one Redis with the
// same Prefix.
type Store struct {
	c           redis.UniversalClient
	prefix      string
	timeout     time.Duration // <= 0: none
	cooldown    time.Duration // <= 0: none
	compressMin int           // < 0: never
	maxEntry    int           // <= 0: no limit
	leaseTTL    time.Duration
	leasePoll   time.Duration
	now         func() time.Time
	closed      atomic.Bool
	closeCtx    context.Context // ends at Close; lease renewals run under it
	cancel      context.CancelFunc
	// cooling counts the nodes in downUntil, so that calls skip the
	// lookup while none cools down.
	cooling atomic.Int64
	// downMu guards downUntil.
	downMu sync.Mutex
	// downUntil holds the cooldown of each node (see node) that has one.
	downUntil map[string]*cooldown
	// mu orders starting a renewal (renewals.Add) with Close, which sets
	// closed under it and then waits for the renewals.
	mu            sync.Mutex
	renewals      sync.WaitGroup
	releaseScript *redis.Script
	renewScript   *redis.Script
}

var (
	_ cache.Store        = (*Store)(nil)
	_ cache.ExpiryGetter = (*Store)(nil)
)

// New returns a Store on c. The caller keeps ownership of c and closes it
// after the Store.
func New(c redis.UniversalClient, opts Options) (*Store, error) {
	if c == nil {
		return nil, errors.New("redisstore: New: nil client")
	}
	s := &Store{
		c:             c,
		prefix:        opts.Prefix,
		timeout:       opts.Timeout,
		cooldown:      opts.Cooldown,
		compressMin:   opts.CompressMin,
		maxEntry:      opts.MaxEntryBytes,
		leaseTTL:      opts.LeaseTTL,
		leasePoll:     opts.LeasePoll,
		now:           opts.Now,
		releaseScript: redis.NewScript(releaseLua),
		renewScript:   redis.NewScript(renewLua),
		downUntil:     map[string]*cooldown{},
	}
	if s.prefix == "" {
		s.prefix = DefaultPrefix
	}
	for _, r := range s.prefix {
		if r == '{' || r == '}' {
			return nil, fmt.Errorf("redisstore: prefix %q must not hold '{' or '}' (they pick the cluster slot)", s.prefix)
		}
	}
	if s.timeout == 0 {
		s.timeout = DefaultTimeout
	}
	if s.cooldown == 0 {
		s.cooldown = DefaultCooldown
	}
	if s.compressMin == 0 {
		s.compressMin = DefaultCompressMin
	}
	if s.maxEntry == 0 {
		s.maxEntry = DefaultMaxEntryBytes
	}
	if s.leaseTTL <= 0 {
		s.leaseTTL = DefaultLeaseTTL
	}
	if s.leaseTTL < 3*time.Millisecond {
		return nil, fmt.Errorf("redisstore: LeaseTTL %v is shorter than 3ms", s.leaseTTL)
	}
	if s.leasePoll <= 0 {
		s.leasePoll = DefaultLeasePoll
	}
	if s.now == nil {
		s.now = time.Now
	}
	s.closeCtx, s.cancel = context.WithCancel(context.Background())
	return s, nil
}

// valueKey, leaseKey and channel name key's entry, lease and release
// notices, all in the slot of key's hash tag.
func (s *Store) valueKey(key string) string { return s.prefix + ":cache:{" + key + "}:v" }
func (s *Store) leaseKey(key string) string { return s.prefix + ":cache:{" + key + "}:l" }
func (s *Store) channel(key string) string  { return s.prefix + ":cache:{" + key + "}:n" }

// enter checks the store, the key and ctx, and returns ctx bounded by the
// store's timeout; the caller must call the cancel function.
func (s *Store) enter(ctx context.Context, key string) (context.Context, context.CancelFunc, error) {
	if s.closed.Load() {
		return nil, nil, cache.ErrClosed
	}
	if err := ctx.Err(); err != nil {
		return nil, nil, err
	}
	if key == "" {
		return nil, nil, errors.New("redisstore: empty key")
	}
	if s.cooling.Load() > 0 {
		if node, cool := s.coolingDown(ctx, key); cool {
			return nil, nil, fmt.Errorf("%w (%s cooling down after a failure)", ErrUnavailable, nodeName(node))
		}
	}
	if s.timeout > 0 {
		c, cancel := context.WithTimeout(ctx, s.timeout)
		return c, cancel, nil
	}
	return ctx, func() {}, nil
}

// fail classifies err from a Redis call made under a context derived from
// ctx: the caller's own cancellation stays as it is, and a failure to reach
// Redis in time becomes ErrUnavailable and starts (or extends) the cooldown
// of key's node.
func (s *Store) fail(ctx context.Context, op, key string, err error) error {
	if ctxErr := ctx.Err(); ctxErr != nil && errors.Is(err, ctxErr) {
		return fmt.Errorf("redisstore: %s %.16s…: %w", op, key, err)
	}
	if unavailable(err) {
		if s.cooldown > 0 {
			node := s.node(ctx, key)
			now := s.now().UnixNano()
			s.downMu.Lock()
			c, ok := s.downUntil[node]
			if !ok {
				c = &cooldown{}
				s.downUntil[node] = c
				s.cooling.Add(1)
			}
			c.until = now + int64(s.cooldown)
			c.probe = now + int64(s.cooldown/probesPerCooldown)
			s.downMu.Unlock()
		}
		return fmt.Errorf("redisstore: %s %.16s…: %w: %w", op, key, ErrUnavailable, err)
	}
	return fmt.Errorf("redisstore: %s %.16s…: %w", op, key, err)
}

// ok notes a call for key that reached Redis, ending its node's cooldown
// early.
func (s *Store) ok(ctx context.Context, key string) {
	if s.cooling.Load() == 0 {
		return
	}
	node := s.node(ctx, key)
	s.downMu.Lock()
	if _, ok := s.downUntil[node]; ok {
		delete(s.downUntil, node)
		s.cooling.Add(-1)
	}
	s.downMu.Unlock()
}

// node names the node a call for key goes to: on a cluster client the
// address of the primary of key's slot in go-redis's current slot map,
// else "" (one server).
func (s *Store) node(ctx context.Context, key string) string {
	if cc, ok := s.c.(*redis.ClusterClient); ok {
		if c, err := cc.MasterForKey(ctx, s.valueKey(key)); err == nil {
			return c.Options().Addr
		}
	}
	return ""
}

// probesPerCooldown is how many calls per Cooldown go to a cooling node
// anyway, one at a time, so that the store finds out within a tenth of
// the cooldown that the node (or the cluster) answers again.
const probesPerCooldown = 10

// cooldown is one node's: calls fail fast until until, except one probe
// whenever probe has passed. Guarded by Store.downMu.
type cooldown struct {
	until, probe int64 // Unix ns
}

// coolingDown reports whether a call for key must fail fast because its node
// cools down, and names the node. A call let through as the node's probe
// moves the next probe on.
func (s *Store) coolingDown(ctx context.Context, key string) (string, bool) {
	node := s.node(ctx, key)
	now := s.now().UnixNano()
	s.downMu.Lock()
	defer s.downMu.Unlock()
	c, ok := s.downUntil[node]
	switch {
	case !ok || now >= c.until:
		return node, false
	case now >= c.probe:
		c.probe = now + int64(s.cooldown/probesPerCooldown)
		return node, false
	}
	return node, true
}

// nodeName renders a node for an error message.
func nodeName(node string) string {
	if node == "" {
		return "redis"
	}
	return node
}

// unavailable reports whether err means Redis was not reached or did not
// answer in time, as opposed to an answer from Redis (redis.Error).
func unavailable(err error) bool {
	var re redis.Error
	if errors.As(err, &re) {
		// Replies that mean the server cannot serve now.
		msg := re.Error()
		for _, p := range []string{"LOADING", "CLUSTERDOWN", "TRYAGAIN", "MASTERDOWN", "BUSY"} {
			if len(msg) >= len(p) && msg[:len(p)] == p {
				return true
			}
		}
		return false
	}
	var ne net.Error
	return errors.As(err, &ne) || errors.Is(err, context.DeadlineExceeded) ||
		errors.Is(err, redis.ErrPoolTimeout) || errors.Is(err, redis.ErrClosed) ||
		errors.Is(err, net.ErrClosed) || isEOF(err)
}

// Get returns the value stored under key, or found=false if there is none.
func (s *Store) Get(ctx context.Context, key string) (value []byte, found bool, err error) {
	value, _, found, err = s.GetWithExpiry(ctx, key)
	return value, found, err
}

// GetWithExpiry is Get that also reports when the entry expires (the zero
// Time if never), by the clock of the process that stored it.
func (s *Store) GetWithExpiry(ctx context.Context, key string) (value []byte, expiresAt time.Time, found bool, err error) {
	cctx, cancel, err := s.enter(ctx, key)
	if err != nil {
		return nil, time.Time{}, false, err
	}
	defer cancel()
	raw, err := s.c.Get(cctx, s.valueKey(key)).Bytes()
	if errors.Is(err, redis.Nil) {
		s.ok(ctx, key)
		return nil, time.Time{}, false, nil
	}
	if err != nil {
		return nil, time.Time{}, false, s.fail(ctx, "get", key, err)
	}
	s.ok(ctx, key)
	value, exp, err := s.decode(raw)
	if err != nil {
		return nil, time.Time{}, false, fmt.Errorf("redisstore: get %.16s…: %w", key, err)
	}
	if exp != 0 {
		expiresAt = time.Unix(0, exp)
	}
	return value, expiresAt, true, nil
}

// Put stores value under key for ttl (ttl <= 0: until Redis evicts it under
// its memory policy), replacing any previous value. It returns once Redis
// has acknowledged the write.
func (s *Store) Put(ctx context.Context, key string, value []byte, ttl time.Duration) error {
	cctx, cancel, err := s.enter(ctx, key)
	if err != nil {
		return err
	}
	defer cancel()
	var exp int64
	if ttl > 0 {
		ttl = max(ttl, time.Millisecond) // PX counts whole milliseconds
		exp = s.now().Add(ttl).UnixNano()
	} else {
		ttl = 0 // SET without an expiry (KeepTTL is -1)
	}
	rec := s.encode(value, exp)
	if s.maxEntry > 0 && len(rec) > s.maxEntry {
		return fmt.Errorf("redisstore: put %.16s…: %d bytes stored, limit %d: %w", key, len(rec), s.maxEntry, cache.ErrTooLarge)
	}
	if err := s.c.Set(cctx, s.valueKey(key), rec, ttl).Err(); err != nil {
		return s.fail(ctx, "put", key, err)
	}
	s.ok(ctx, key)
	return nil
}

// Delete removes key. Deleting a missing key is not an error.
func (s *Store) Delete(ctx context.Context, key string) error {
	cctx, cancel, err := s.enter(ctx, key)
	if err != nil {
		return err
	}
	defer cancel()
	if err := s.c.Del(cctx, s.valueKey(key)).Err(); err != nil {
		return s.fail(ctx, "delete", key, err)
	}
	s.ok(ctx, key)
	return nil
}

// Close stops the renewal of leases still held (they then expire after
// LeaseTTL) and makes later calls fail with cache.ErrClosed. It does not
// close the client. A second Close returns nil.
func (s *Store) Close() error {
	s.mu.Lock()
	already := s.closed.Swap(true)
	s.mu.Unlock()
	if already {
		return nil
	}
	s.cancel()
	s.renewals.Wait()
	return nil
}
