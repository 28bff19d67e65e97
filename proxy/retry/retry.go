// Package retry decides how long to wait before retrying an upstream call:
// exponential backoff with full jitter, and the upstream's own Retry-After
// (RFC 9110 §10.2.3) when it sent one.
//
// It only computes waits; the caller sleeps (honouring its context) and
// decides which failures are safe to retry.
package retry

import (
	"errors"
	"math/rand/v2"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"
)

// Defaults for the zero fields of Policy.
const (
	DefaultAttempts      = 3
	DefaultBase          = 250 * time.Millisecond
	DefaultMaxDelay      = 5 * time.Second
	DefaultBudgetShare   = 0.1
	DefaultBudgetReserve = 10
)

// Policy bounds the retries of one call. The zero value is the defaults;
// it is a plain value, safe to copy and to share between goroutines.
type Policy struct {
	// Attempts is the most calls made in all, the first included: zero
	// means DefaultAttempts, 1 (or -1) means no retries.
	Attempts int
	// Base is the backoff's first ceiling: retry n (from 0) waits a
	// uniformly random time in [0, min(MaxDelay, Base·2^n)]. Zero means
	// DefaultBase.
	Base time.Duration
	// MaxDelay caps the backoff, and is the longest Retry-After waited
	// for: a longer one ends the retries, so the caller hands the answer
	// (with its Retry-After) back to its client. Zero means
	// DefaultMaxDelay.
	MaxDelay time.Duration
	// BudgetShare and BudgetReserve size the Budget that retries after a
	// 429 are paid from: each call adds BudgetShare of a retry, up to
	// BudgetReserve retries. Zero means DefaultBudgetShare and
	// DefaultBudgetReserve; -1 in BudgetReserve means no budget (every
	// 429 may be retried, up to Attempts).
	BudgetShare   float64
	BudgetReserve int
}

// Validate reports the first bad field, by its name.
func (p Policy) Validate() error {
	switch {
	case p.Attempts < -1:
		return errors.New("attempts must be positive, 0 (default) or -1 (no retries)")
	case p.Base < 0:
		return errors.New("base_delay must not be negative")
	case p.MaxDelay < 0:
		return errors.New("max_delay must not be negative")
	case p.BudgetShare < 0 || p.BudgetShare > 1 || p.BudgetShare != p.BudgetShare:
		return errors.New("budget_share must be between 0 (default) and 1")
	case p.BudgetReserve < -1:
		return errors.New("budget_reserve must be positive, 0 (default) or -1 (no budget)")
	}
	return nil
}

// Budget is the policy's retry budget, or nil when it has none.
func (p Policy) Budget() *Budget {
	if p.BudgetReserve == -1 {
		return nil
	}
	share, reserve := p.BudgetShare, p.BudgetReserve
	if share == 0 {
		share = DefaultBudgetShare
	}
	if reserve == 0 {
		reserve = DefaultBudgetReserve
	}
	return NewBudget(share, reserve)
}

// Budget bounds the retries of the calls it is shared by, so that an
// upstream answering every call with 429 is not sent every call again up
// to Attempts times: each call adds share of a retry to the budget, up to
// reserve whole retries (it starts full), and each retry takes one. In a
// storm the upstream then gets at most 1 + share calls per request, plus
// the reserve once. It is safe for concurrent use; a nil *Budget allows
// every retry.
type Budget struct {
	mu      sync.Mutex // guards tokens
	tokens  int64      // in thousandths of a retry
	share   int64      // thousandths added per call
	reserve int64      // most thousandths held
}

// NewBudget returns a full Budget: reserve retries, refilled by share of
// a retry per call.
func NewBudget(share float64, reserve int) *Budget {
	r := int64(reserve) * 1000
	return &Budget{tokens: r, share: int64(share*1000 + 0.5), reserve: r}
}

// Called adds one call's share to the budget.
func (b *Budget) Called() {
	if b == nil {
		return
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	b.tokens = min(b.tokens+b.share, b.reserve)
}

// Retry takes one retry from the budget and reports whether there was one
// to take.
func (b *Budget) Retry() bool {
	if b == nil {
		return true
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	if b.tokens < 1000 {
		return false
	}
	b.tokens -= 1000
	return true
}

// MaxAttempts returns the most calls the policy allows, at least 1.
func (p Policy) MaxAttempts() int {
	switch {
	case p.Attempts == 0:
		return DefaultAttempts
	case p.Attempts < 1:
		return 1
	}
	return p.Attempts
}

func (p Policy) base() time.Duration {
	if p.Base > 0 {
		return p.Base
	}
	return DefaultBase
}

// Cap returns the longest wait before a retry.
func (p Policy) Cap() time.Duration {
	if p.MaxDelay > 0 {
		return p.MaxDelay
	}
	return DefaultMaxDelay
}

// Ceiling returns the upper end of retry n's backoff (n from 0):
// min(Cap, Base·2^n), computed without overflow.
func (p Policy) Ceiling(n int) time.Duration {
	c, b := p.Cap(), p.base()
	if b >= c {
		return c
	}
	for range n {
		b *= 2
		if b >= c || b <= 0 {
			return c
		}
	}
	return b
}

// Backoff returns the wait before retry n (n from 0): full jitter, a
// uniformly random duration in [0, Ceiling(n)], drawn from r. r is not
// safe for concurrent use; the caller guards it.
func (p Policy) Backoff(n int, r *rand.Rand) time.Duration {
	return time.Duration(r.Int64N(int64(p.Ceiling(n)) + 1))
}

// Delay is the wait before a retry and where it came from.
type Delay struct {
	Wait time.Duration
	// FromHeader is true when Wait is the upstream's Retry-After.
	FromHeader bool
}

// Next returns the wait before retry n after an answer with header h
// (nil for a transport failure): the Retry-After when h has a valid one,
// else Backoff(n, r). ok is false when the Retry-After asks for longer
// than Cap, meaning: do not retry.
func (p Policy) Next(n int, h http.Header, now time.Time, r *rand.Rand) (d Delay, ok bool) {
	if ra, has := RetryAfter(h, now); has {
		if ra > p.Cap() {
			return Delay{Wait: ra, FromHeader: true}, false
		}
		return Delay{Wait: ra, FromHeader: true}, true
	}
	return Delay{Wait: p.Backoff(n, r)}, true
}

// RetryAfter reads the Retry-After header of h (RFC 9110 §10.2.3): either
// delay-seconds (a non-negative integer) or an HTTP-date, which is turned
// into the time left from now (zero when already past). ok is false when
// the header is absent or malformed.
func RetryAfter(h http.Header, now time.Time) (time.Duration, bool) {
	if h == nil {
		return 0, false
	}
	v := strings.TrimSpace(h.Get("Retry-After"))
	if v == "" {
		return 0, false
	}
	if v[0] >= '0' && v[0] <= '9' {
		secs, err := strconv.ParseUint(v, 10, 32)
		if err != nil {
			return 0, false
		}
		return time.Duration(secs) * time.Second, true
	}
	t, err := http.ParseTime(v)
	if err != nil {
		return 0, false
	}
	return max(t.Sub(now), 0), true
}
