package cache

import (
	"context"
	"errors"
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
	// MaxAge bounds how long any entry is served from memory without
	// asking the backing store, whatever its TTL there. In front of a
	// store that several processes share (Redis), it bounds how long this
	// process can keep serving an answer that another one has since
	// replaced (a no-cache refresh) or deleted. 0 means no bound beyond the
	// entry's TTL. Past MaxAge the entry leaves memory, unless StaleIfError.
	MaxAge time.Duration
	// StaleIfError keeps an entry in memory past MaxAge (until its TTL, or
	// until the byte bound evicts it) so that it can stand in for the
	// backing store while that fails: a Get past MaxAge asks the store,
	// takes its answer when it gives one (found or not found), and serves
	// the copy in memory when the store fails, for as long as it fails. A
	// Put that the store refuses (other than with ErrTooLarge) keeps the
	// value in memory in the same way, already past MaxAge. GetStale tells
	// such answers apart. Without MaxAge it changes nothing.
	StaleIfError bool
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
	// freshUntil is when the entry stops being served without asking the
	// store (Unix ns); 0 means until expiresAt. Only StaleIfError sets it.
	freshUntil int64
}

// Hot is an in-process tier in front of a backing Store: a concurrent,
// byte-bounded cache (github.com/maypok86/otter/v2, which evicts by
// frequency and recency with W-TinyLFU) that answers repeated Gets without
// touching the store.
//
// Get looks in memory, then in the backing store, and keeps what it found in
// memory. Put writes through: the backing store first, then memory, so a
// failed Put leaves memory unchanged (but see StaleIfError). Delete removes
// from both. TTLs hold in memory too. With HotOptions.StaleIfError the tier
// also stands in for a failing backing store with what it holds. Values handed to Put are copied; the slices Get returns are
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
	stale    bool          // StaleIfError with a MaxAge
	now      func() time.Time
	closed   atomic.Bool
	// writes counts Puts and Deletes, so a fill can tell that one ran
	// while it read the store (see fill).
	writes atomic.Uint64
	// misses counts Gets memory could not answer. Hits come from otter's
	// striped counter, which also counts the fills' lookups as misses.
	misses atomic.Uint64
	// staleHits counts stale copies served because the store failed.
	staleHits atomic.Uint64
}

var _ Store = (*Hot)(nil)

// NewHot returns a Hot tier in front of backing.
func NewHot(backing Store, opts HotOptions) *Hot {
	h := &Hot{backing: backing, fillTTL: opts.FillTTL, maxAge: opts.MaxAge, now: opts.Now,
		stale: opts.StaleIfError && opts.MaxAge > 0}
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
// backing store. The returned slice must not be modified. With
// StaleIfError, a stale copy served because the store failed is returned
// without an error (see GetStale).
func (h *Hot) Get(ctx context.Context, key string) ([]byte, bool, error) {
	value, found, stale, err := h.GetStale(ctx, key)
	if stale {
		return value, true, nil
	}
	return value, found, err
}

// GetStale is Get that tells when the value is a copy kept in memory past
// MaxAge and served because the backing store failed (StaleIfError): then
// value is that copy, found and stale are true, and err is the store's
// error. Otherwise stale is false and the results are Get's.
func (h *Hot) GetStale(ctx context.Context, key string) (value []byte, found, stale bool, err error) {
	if h.closed.Load() {
		return nil, false, false, ErrClosed
	}
	if err := ctx.Err(); err != nil {
		return nil, false, false, err
	}
	if h.mem == nil {
		value, found, err = h.backing.Get(ctx, key)
		return value, found, false, err
	}
	if e, ok := h.mem.GetIfPresent(key); ok {
		if e.freshUntil == 0 || h.now().UnixNano() < e.freshUntil {
			return e.value, true, false, nil
		}
		return h.revalidate(ctx, key, e)
	}
	value, found, err = h.fill(ctx, key)
	return value, found, false, err
}

// read gets key and its expiry from the backing store.
func (h *Hot) read(ctx context.Context, key string) ([]byte, time.Time, bool, error) {
	if h.expiring != nil {
		return h.expiring.GetWithExpiry(ctx, key)
	}
	value, found, err := h.backing.Get(ctx, key)
	return value, h.now().Add(h.fillTTL), found, err
}

// fill reads key from the backing store and keeps it in memory. The write
// counter is read before the store: if a Put or Delete of any key starts
// after that, the fill is dropped, checked under otter's per-key lock so it
// cannot interleave with that Put's or Delete's own memory update.
func (h *Hot) fill(ctx context.Context, key string) ([]byte, bool, error) {
	h.misses.Add(1)
	seen := h.writes.Load()
	value, exp, found, err := h.read(ctx, key)
	if err != nil || !found {
		return nil, false, err
	}
	if h.maxEntry >= 0 && int64(len(value)) > h.maxEntry {
		return value, true, nil
	}
	e := h.entry(value, exp)
	h.mem.Compute(key, func(old hotEntry, present bool) (hotEntry, otter.ComputeOp) {
		if present || h.writes.Load() != seen {
			return old, otter.CancelOp
		}
		return e, otter.WriteOp
	})
	return value, true, nil
}

// revalidate asks the backing store for key, whose copy in memory (old) is
// past MaxAge: the store's answer replaces it, a miss drops it, and a
// failure serves it. Memory changes only if no Put or Delete ran meanwhile
// (see fill).
func (h *Hot) revalidate(ctx context.Context, key string, old hotEntry) ([]byte, bool, bool, error) {
	h.misses.Add(1)
	seen := h.writes.Load()
	value, exp, found, err := h.read(ctx, key)
	if err != nil {
		if ctx.Err() != nil {
			return nil, false, false, err // the caller has gone; the store did not fail
		}
		h.staleHits.Add(1)
		return old.value, true, true, err
	}
	op := otter.InvalidateOp
	var e hotEntry
	if found {
		if h.maxEntry < 0 || int64(len(value)) <= h.maxEntry {
			e, op = h.entry(value, exp), otter.WriteOp
		}
	}
	h.mem.Compute(key, func(cur hotEntry, present bool) (hotEntry, otter.ComputeOp) {
		if !present || h.writes.Load() != seen {
			return cur, otter.CancelOp
		}
		return e, op
	})
	if !found {
		return nil, false, false, nil
	}
	return value, true, false, nil
}

// entry is the memory entry of value, which expires in the store at exp
// (zero: never): without StaleIfError it lives at most MaxAge; with it, it
// lives until exp and is fresh for MaxAge.
func (h *Hot) entry(value []byte, exp time.Time) hotEntry {
	if !h.stale {
		return hotEntry{value: value, expiresAt: h.capAge(exp)}
	}
	e := hotEntry{value: value, freshUntil: h.capAge(exp)}
	if !exp.IsZero() {
		e.expiresAt = exp.UnixNano()
	}
	return e
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

// Put stores value under key in the backing store and then in memory. A
// failed Put leaves memory unchanged, except with StaleIfError (see
// HotOptions).
func (h *Hot) Put(ctx context.Context, key string, value []byte, ttl time.Duration) error {
	if h.closed.Load() {
		return ErrClosed
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	v := make([]byte, len(value))
	copy(v, value)
	err := h.backing.Put(ctx, key, v, ttl)
	keep := err == nil || (h.stale && !errors.Is(err, ErrTooLarge) && ctx.Err() == nil)
	if h.mem == nil || !keep {
		return err
	}
	h.writes.Add(1)
	if h.maxEntry >= 0 && int64(len(v)) > h.maxEntry {
		h.mem.Invalidate(key) // an older, smaller value may be in memory
		return err
	}
	var exp time.Time
	if ttl > 0 {
		exp = h.now().Add(ttl)
	}
	e := h.entry(v, exp)
	if err != nil {
		e.freshUntil = 1 // the store lacks it: serve it only while the store fails
	}
	h.mem.Set(key, e)
	return err
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
	// Hits and Misses count Gets answered from memory and not. A Get of
	// an entry past MaxAge that asks the store counts as both.
	Hits, Misses uint64
	// Evictions counts entries dropped to stay within MaxBytes.
	Evictions uint64
	// StaleHits counts copies served past MaxAge because the backing
	// store failed (StaleIfError); Hits does not count them.
	StaleHits uint64
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
		StaleHits: h.staleHits.Load(),
		Entries:   h.mem.EstimatedSize(),
		Bytes:     h.mem.WeightedSize(),
	}
}
