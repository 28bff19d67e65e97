package cache

import (
	"context"
	"math"
	"sync/atomic"
	"time"

	"github.com/maypok86/otter/v2"
	"github.com/maypok86/otter/v2/stats"
)

// ExpiryGetter is an optional interface of a Store that can tell when an
// entry expires. Hot uses it so that an entry filled from the store lives in
// memory exactly as long as in the store.
type ExpiryGetter interface {
	// GetWithExpiry is Get that also returns the entry's expiry time, the
	// zero Time if it never expires.
	GetWithExpiry(ctx context.Context, key string) (value []byte, expiresAt time.Time, found bool, err error)
}

// Defaults for zero HotOptions fields.
const (
	// DefaultHotMaxBytes is the memory budget when HotOptions.MaxBytes is zero.
	DefaultHotMaxBytes = 64 << 20
	// DefaultHotFillTTL is HotOptions.FillTTL's default.
	DefaultHotFillTTL = time.Minute
)

// HotOptions configure a Hot tier. A field's zero value means its default.
type HotOptions struct {
	// MaxBytes bounds the memory the tier's entries take (key, value and a
	// fixed per-entry overhead). 0 means DefaultHotMaxBytes; -1 turns the
	// tier off, so every call goes to the backing store.
	MaxBytes int64
	// MaxEntryBytes is the largest value kept in memory; larger ones are
	// only in the backing store. 0 means MaxBytes/8; -1 means no limit.
	MaxEntryBytes int64
	// FillTTL is how long an entry read from a backing store that does not
	// implement ExpiryGetter is kept in memory, which bounds how long it can
	// outlive its expiry in the store. 0 means DefaultHotFillTTL.
	FillTTL time.Duration
	// MaxAge bounds how long any entry stays in memory, whatever its TTL in
	// the backing store. In front of a store that several processes share
	// (Redis), it bounds how long this process can keep serving an answer
	// that another one has since replaced (a no-cache refresh) or deleted.
	// 0 means no bound beyond the entry's TTL.
	MaxAge time.Duration
	// Now is the clock for expiry in memory. nil means time.Now.
	Now func() time.Time
}

// hotEntryOverhead approximates the per-entry memory besides key and value
// bytes (the otter node, the slice headers, the hash table slot).
const hotEntryOverhead = 96

// neverExpires is the in-memory lifetime of an entry without a TTL.
const neverExpires = time.Duration(math.MaxInt64 / 4)

type hotEntry struct {
	value     []byte
	expiresAt int64 // Unix ns; 0 means never
}

// Hot is an in-process tier in front of a backing Store: a concurrent,
// byte-bounded cache (github.com/maypok86/otter/v2, which evicts by
// frequency and recency with W-TinyLFU) that answers repeated Gets without
// touching the store.
//
// Get looks in memory, then in the backing store, and keeps what it found in
// memory. Put writes through: the backing store first, then memory, so a
// failed Put leaves memory unchanged. Delete removes from both. TTLs hold in
// memory too. Values handed to Put are copied; the slices Get returns are
// shared with the tier and with other callers and must not be modified.
//
// Hot is safe for concurrent use. A Get that fills memory from the store
// never overwrites or resurrects an entry that a concurrent Put or Delete
// changed meanwhile. Two concurrent Puts of one key may leave memory and store
// holding different ones of the two values; for a cache of deterministic
// answers both are correct.
//
// Hot owns the backing store: Close closes it.
type Hot struct {
	backing  Store
	expiring ExpiryGetter // backing, if it implements ExpiryGetter
	mem      *otter.Cache[string, hotEntry]
	counter  *stats.Counter
	maxEntry int64 // < 0: no limit
	fillTTL  time.Duration
	maxAge   time.Duration // <= 0: none
	now      func() time.Time
	closed   atomic.Bool
	// writes counts Puts and Deletes, so a fill can tell that one ran
	// while it read the store (see fill).
	writes atomic.Uint64
	// misses counts Gets memory could not answer. Hits come from otter's
	// striped counter, which also counts the fills' lookups as misses.
	misses atomic.Uint64
}

var _ Store = (*Hot)(nil)

// NewHot returns a Hot tier in front of backing.
func NewHot(backing Store, opts HotOptions) *Hot {
	h := &Hot{backing: backing, fillTTL: opts.FillTTL, maxAge: opts.MaxAge, now: opts.Now}
	h.expiring, _ = backing.(ExpiryGetter)
	if h.fillTTL <= 0 {
		h.fillTTL = DefaultHotFillTTL
	}
	if h.now == nil {
		h.now = time.Now
	}
	maxBytes := opts.MaxBytes
	if maxBytes == 0 {
		maxBytes = DefaultHotMaxBytes
	}
	if maxBytes < 0 {
		return h // tier off
	}
	h.maxEntry = opts.MaxEntryBytes
	if h.maxEntry == 0 {
		h.maxEntry = maxBytes / 8
	}
	h.counter = stats.NewCounter()
	o := &otter.Options[string, hotEntry]{
		MaximumWeight: uint64(maxBytes),
		Weigher: func(key string, e hotEntry) uint32 {
			return uint32(min(int64(len(key))+int64(len(e.value))+hotEntryOverhead, math.MaxUint32))
		},
		ExpiryCalculator: otter.ExpiryWritingFunc(func(e otter.Entry[string, hotEntry]) time.Duration {
			if e.Value.expiresAt == 0 {
				return neverExpires
			}
			// otter keeps an entry forever when told a non-positive
			// duration, so one already past its expiry (a fill racing the
			// store's own expiry, a TTL shorter than this call took) is
			// given the shortest life instead.
			return max(time.Duration(e.Value.expiresAt-h.now().UnixNano()), time.Nanosecond)
		}),
		StatsRecorder: h.counter,
	}
	if opts.Now != nil {
		o.Clock = hotClock{opts.Now}
	}
	h.mem = otter.Must(o)
	return h
}

// hotClock adapts a Now function to otter's clock. It does not tick, so
// expired entries are dropped on access and during writes, not periodically.
type hotClock struct{ now func() time.Time }

func (c hotClock) NowNano() int64                      { return c.now().UnixNano() }
func (c hotClock) Tick(time.Duration) <-chan time.Time { return nil }

// Get returns the value under key from memory or, failing that, from the
// backing store. The returned slice must not be modified.
func (h *Hot) Get(ctx context.Context, key string) ([]byte, bool, error) {
	if h.closed.Load() {
		return nil, false, ErrClosed
	}
	if err := ctx.Err(); err != nil {
		return nil, false, err
	}
	if h.mem == nil {
		return h.backing.Get(ctx, key)
	}
	if e, ok := h.mem.GetIfPresent(key); ok {
		return e.value, true, nil
	}
	return h.fill(ctx, key)
}

// fill reads key from the backing store and keeps it in memory. The write
// counter is read before the store: if a Put or Delete of any key starts
// after that, the fill is dropped, checked under otter's per-key lock so it
// cannot interleave with that Put's or Delete's own memory update.
func (h *Hot) fill(ctx context.Context, key string) ([]byte, bool, error) {
	h.misses.Add(1)
	seen := h.writes.Load()
	var (
		value []byte
		exp   time.Time
		found bool
		err   error
	)
	if h.expiring != nil {
		value, exp, found, err = h.expiring.GetWithExpiry(ctx, key)
	} else {
		value, found, err = h.backing.Get(ctx, key)
		exp = h.now().Add(h.fillTTL)
	}
	if err != nil || !found {
		return nil, false, err
	}
	if h.maxEntry >= 0 && int64(len(value)) > h.maxEntry {
		return value, true, nil
	}
	e := hotEntry{value: value, expiresAt: h.capAge(exp)}
	h.mem.Compute(key, func(old hotEntry, present bool) (hotEntry, otter.ComputeOp) {
		if present || h.writes.Load() != seen {
			return old, otter.CancelOp
		}
		return e, otter.WriteOp
	})
	return value, true, nil
}

// capAge returns the in-memory expiry (Unix ns, 0: never) of an entry that
// expires in the store at exp (zero: never), bounded by MaxAge.
func (h *Hot) capAge(exp time.Time) int64 {
	if h.maxAge > 0 {
		if limit := h.now().Add(h.maxAge); exp.IsZero() || exp.After(limit) {
			exp = limit
		}
	}
	if exp.IsZero() {
		return 0
	}
	return exp.UnixNano()
}

// Put stores value under key in the backing store and then in memory.
func (h *Hot) Put(ctx context.Context, key string, value []byte, ttl time.Duration) error {
	if h.closed.Load() {
		return ErrClosed
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	v := make([]byte, len(value))
	copy(v, value)
	if err := h.backing.Put(ctx, key, v, ttl); err != nil {
		return err
	}
	if h.mem == nil {
		return nil
	}
	h.writes.Add(1)
	if h.maxEntry >= 0 && int64(len(v)) > h.maxEntry {
		h.mem.Invalidate(key) // an older, smaller value may be in memory
		return nil
	}
	var exp time.Time
	if ttl > 0 {
		exp = h.now().Add(ttl)
	}
	h.mem.Set(key, hotEntry{value: v, expiresAt: h.capAge(exp)})
	return nil
}

// Delete removes key from the backing store and from memory.
func (h *Hot) Delete(ctx context.Context, key string) error {
	if h.closed.Load() {
		return ErrClosed
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	err := h.backing.Delete(ctx, key)
	if h.mem != nil {
		h.writes.Add(1)
		h.mem.Invalidate(key)
	}
	return err
}

// Close empties memory, stops the tier's goroutines and closes the backing
// store. Later calls return ErrClosed; a second Close returns nil.
func (h *Hot) Close() error {
	if h.closed.Swap(true) {
		return nil
	}
	if h.mem != nil {
		h.mem.InvalidateAll()
		h.mem.StopAllGoroutines()
	}
	return h.backing.Close()
}

// HotStats are counters of a Hot tier since it was made.
type HotStats struct {
	// Hits and Misses count Gets answered from memory and not.
	Hits, Misses uint64
	// Evictions counts entries dropped to stay within MaxBytes.
	Evictions uint64
	// Entries and Bytes are the current number and weight of entries in
	// memory (approximate: expired entries may still be counted).
	Entries int
	Bytes   uint64
}

// Stats returns the tier's counters; all zero when the tier is off.
func (h *Hot) Stats() HotStats {
	if h.mem == nil {
		return HotStats{}
	}
	s := h.counter.Snapshot()
	return HotStats{
		Hits:      s.Hits,
		Misses:    h.misses.Load(),
		Evictions: s.Evictions,
		Entries:   h.mem.EstimatedSize(),
		Bytes:     h.mem.WeightedSize(),
	}
}
