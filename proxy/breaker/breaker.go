// Package breaker is a circuit breaker for one upstream, on
// github.com/sony/gobreaker/v2: closed (calls go through), open (calls are
// refused until OpenFor has passed), half-open (a few probe calls go
// through; a success closes it, a failure opens it again).
//
// A Breaker is local to the process, or shared by every replica through a
// gobreaker.SharedDataStore (breaker/redisstate keeps it in Redis), so
// that once one replica sees an upstream fail, all of them stop calling
// it. While the store cannot be reached the Breaker uses its own local
// state, which starts counting from then, and tries the store again after
// StoreRetry.
//
// The caller asks Allow before a call and reports the call's Outcome on
// the Permit afterwards. The call itself never runs under a lock: gobreaker
// v2's distributed Execute holds the shared lock for the whole call, which
// would serialize every replica's calls, so the Breaker uses Execute only to
// record an outcome that is already known, under a lock of its own (that
// Execute reads the shared state before taking its lock, which loses
// concurrent updates).
package breaker

import (
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"sync"
	"sync/atomic"
	"time"

	"github.com/sony/gobreaker/v2"
)

// Defaults for the zero fields of Settings.
const (
	DefaultConsecutiveFailures = 5
	DefaultFailureRatio        = 0.5
	DefaultMinRequests         = 20
	DefaultWindow              = time.Minute
	DefaultOpenFor             = 30 * time.Second
	DefaultProbes              = 1
	// StoreRetry is how long a Breaker keeps to its local state after the
	// shared store failed, before it tries the store again.
	StoreRetry = 5 * time.Second
)

// Settings configure a Breaker. Zero fields mean the defaults above; -1
// turns a trip rule off.
type Settings struct {
	// Off turns the breaker off: every call is allowed.
	Off bool
	// ConsecutiveFailures trips the breaker after this many failures in a
	// row.
	ConsecutiveFailures int
	// FailureRatio trips the breaker when at least this share (0 to 1] of
	// the calls in Window failed, once Window has seen MinRequests calls.
	FailureRatio float64
	// MinRequests is how many calls Window must hold before FailureRatio
	// applies.
	MinRequests int
	// Window is the rolling window FailureRatio is measured over (ten
	// buckets of Window/10).
	Window time.Duration
	// OpenFor is how long the breaker stays open before it lets probes
	// through (half-open).
	OpenFor time.Duration
	// Probes is how many calls a half-open breaker lets through at once
	// (per replica), and how many successes in a row close it.
	Probes int
	// ProbeEvery, while the breaker is open, lets one call through as an
	// early probe once this long has passed since it opened or since the
	// last early probe (one at a time per replica); the probe's success
	// closes the breaker, for every replica sharing it, without waiting
	// out OpenFor. Zero: no early probes.
	ProbeEvery time.Duration
}

// Validate reports the first bad field, by its name.
func (s Settings) Validate() error {
	switch {
	case s.ConsecutiveFailures < -1:
		return errors.New("consecutive_failures must be positive, 0 (default) or -1 (off)")
	case s.FailureRatio != -1 && (s.FailureRatio < 0 || s.FailureRatio > 1 || math.IsNaN(s.FailureRatio)):
		return errors.New("failure_ratio must be in (0, 1], 0 (default) or -1 (off)")
	case s.MinRequests < 0:
		return errors.New("min_requests must not be negative")
	case s.Window < 0:
		return errors.New("window must not be negative")
	case s.OpenFor < 0:
		return errors.New("open_for must not be negative")
	case s.Probes < 0:
		return errors.New("probes must not be negative")
	case s.ProbeEvery < 0:
		return errors.New("probe_every must not be negative")
	case s.ConsecutiveFailures == -1 && s.FailureRatio == -1 && !s.Off:
		return errors.New("consecutive_failures and failure_ratio are both off; set off: true to turn the breaker off")
	}
	return nil
}

// withDefaults fills the zero fields.
func (s Settings) withDefaults() Settings {
	if s.ConsecutiveFailures == 0 {
		s.ConsecutiveFailures = DefaultConsecutiveFailures
	}
	if s.FailureRatio == 0 {
		s.FailureRatio = DefaultFailureRatio
	}
	if s.MinRequests == 0 {
		s.MinRequests = DefaultMinRequests
	}
	if s.Window == 0 {
		s.Window = DefaultWindow
	}
	if s.OpenFor == 0 {
		s.OpenFor = DefaultOpenFor
	}
	if s.Probes == 0 {
		s.Probes = DefaultProbes
	}
	return s
}

// readyToTrip is the trip rule: enough failures in a row, or a high enough
// failure share over the window.
func (s Settings) readyToTrip(c gobreaker.Counts) bool {
	if s.ConsecutiveFailures > 0 && c.ConsecutiveFailures >= uint32(s.ConsecutiveFailures) {
		return true
	}
	n := c.TotalSuccesses + c.TotalFailures
	return s.FailureRatio > 0 && n > 0 && n >= uint32(s.MinRequests) && float64(c.TotalFailures) >= s.FailureRatio*float64(n)
}

// ErrOpen is what OpenError unwraps to: the breaker refused the call.
var ErrOpen = errors.New("circuit breaker is open")

// OpenError is Allow's refusal.
type OpenError struct {
	Name string
	// Until is when the breaker lets probes through again.
	Until time.Time
	// Probing is true when the breaker is half-open and its probe slots
	// are taken.
	Probing bool
}

// Error says which breaker refused and until when.
func (e *OpenError) Error() string {
	if e.Probing {
		return fmt.Sprintf("circuit breaker of %s is half-open and its probes are in flight", e.Name)
	}
	return fmt.Sprintf("circuit breaker of %s is open until %s", e.Name, e.Until.UTC().Format(time.RFC3339))
}

// Unwrap returns ErrOpen.
func (e *OpenError) Unwrap() error { return ErrOpen }

// RetryAfter is the wait to tell a client: the time until Until in whole
// seconds, rounded up, at least one.
func (e *OpenError) RetryAfter(now time.Time) time.Duration {
	d := e.Until.Sub(now)
	return max(time.Duration(math.Ceil(d.Seconds()))*time.Second, time.Second)
}

// Hooks are told about events; nil fields are not called. They must not
// block: OnTrip runs under gobreaker's lock.
type Hooks struct {
	// OnTrip is called when this process moves the breaker to open (with a
	// shared store, only the replica that trips it is told).
	OnTrip func()
	// OnStoreError is called when the shared store failed and local state
	// is used instead.
	OnStoreError func(error)
}

// Outcome is how a call went, as far as the breaker is concerned.
type Outcome int

// Outcomes.
const (
	// Success: the upstream answered (2xx, or a 4xx about the request).
	Success Outcome = iota
	// Failure: 5xx, a timeout, a connection error, an answer cut short.
	Failure
	// Ignored: neither (429 back-pressure, the caller gave up).
	Ignored
)

var errFailed = errors.New("breaker: call failed")

// Breaker is a circuit breaker for one upstream. Create it with New; it is
// safe for concurrent use.
type Breaker struct {
	name  string
	set   Settings
	hooks Hooks
	now   func() time.Time
	local atomic.Pointer[gobreaker.CircuitBreaker[struct{}]] // replaced when an early probe closes it
	store gobreaker.SharedDataStore                          // nil: local only
	gs    gobreaker.Settings

	localOpened atomic.Int64 // unix nanoseconds the local breaker last opened

	initMu sync.Mutex // serializes creating shared

	mu        sync.Mutex // guards the fields below
	shared    *gobreaker.DistributedCircuitBreaker[struct{}]
	storeDown time.Time // local state is used until then
	probes    int       // half-open calls in flight
	earlyAt   time.Time // when the last early probe went out
	earlyBusy bool      // an early probe is in flight
}

// New returns a Breaker named name (the shared state's key). store nil
// keeps the state in the process. Times are read from time.Now, as
// gobreaker does: the open timer cannot run on another clock.
func New(name string, s Settings, store gobreaker.SharedDataStore, hooks Hooks) (*Breaker, error) {
	if err := s.Validate(); err != nil {
		return nil, fmt.Errorf("breaker %s: %w", name, err)
	}
	b := &Breaker{name: name, set: s.withDefaults(), hooks: hooks, now: time.Now, store: store}
	b.gs = gobreaker.Settings{
		Name:         name,
		MaxRequests:  uint32(b.set.Probes),
		Interval:     b.set.Window,
		BucketPeriod: b.set.Window / 10,
		Timeout:      b.set.OpenFor,
		ReadyToTrip:  b.set.readyToTrip,
	}
	b.local.Store(b.newLocal())
	return b, nil
}

// newLocal makes a closed local breaker.
func (b *Breaker) newLocal() *gobreaker.CircuitBreaker[struct{}] {
	ls := b.gs
	ls.OnStateChange = func(_ string, _, to gobreaker.State) {
		if to == gobreaker.StateOpen {
			b.localOpened.Store(b.now().UnixNano())
			b.tripped()
		}
	}
	return gobreaker.NewCircuitBreaker[struct{}](ls)
}

func (b *Breaker) tripped() {
	if b.hooks.OnTrip != nil {
		b.hooks.OnTrip()
	}
}

// Name returns the breaker's name.
func (b *Breaker) Name() string { return b.name }

// State returns the breaker's state and, when open, when it turns
// half-open. With a shared store it is the shared state (one read), or the
// local one while the store is unreachable.
func (b *Breaker) State() (gobreaker.State, time.Time) {
	if b.set.Off {
		return gobreaker.StateClosed, time.Time{}
	}
	if b.useStore() {
		st, until, err := b.sharedState()
		if err == nil {
			return st, until
		}
		b.storeFailed(err)
	}
	st := b.local.Load().State()
	if st != gobreaker.StateOpen {
		return st, time.Time{}
	}
	return st, time.Unix(0, b.localOpened.Load()).Add(b.set.OpenFor)
}

// sharedState reads the shared state without taking the shared lock: the
// permission check is one read; transitions are made when an outcome is
// recorded.
func (b *Breaker) sharedState() (gobreaker.State, time.Time, error) {
	data, err := b.store.GetData(stateKey(b.name))
	if err != nil {
		return 0, time.Time{}, err
	}
	if len(data) == 0 {
		return gobreaker.StateClosed, time.Time{}, nil
	}
	var s gobreaker.SharedState
	if err := json.Unmarshal(data, &s); err != nil {
		return 0, time.Time{}, fmt.Errorf("breaker %s: shared state: %w", b.name, err)
	}
	if s.State == gobreaker.StateOpen {
		if !b.now().Before(s.Expiry) {
			return gobreaker.StateHalfOpen, time.Time{}, nil
		}
		return gobreaker.StateOpen, s.Expiry, nil
	}
	return s.State, time.Time{}, nil
}

// stateKey is the key gobreaker's distributed breaker keeps its state
// under (gobreaker v2.4.0 distributed_gobreaker.go, sharedStateKey).
func stateKey(name string) string { return "gobreaker:state:" + name }

// Allow asks to make a call. It returns a Permit to report the call's
// outcome on, or an *OpenError.
func (b *Breaker) Allow() (*Permit, error) {
	if b.set.Off {
		return &Permit{}, nil
	}
	st, until := b.State()
	switch st {
	case gobreaker.StateOpen:
		if p := b.earlyProbe(until); p != nil {
			return p, nil
		}
		return nil, &OpenError{Name: b.name, Until: until}
	case gobreaker.StateHalfOpen:
		b.mu.Lock()
		defer b.mu.Unlock()
		if b.probes >= b.set.Probes {
			return nil, &OpenError{Name: b.name, Until: b.now().Add(time.Second), Probing: true}
		}
		b.probes++
		return &Permit{b: b, probe: true}, nil
	}
	return &Permit{b: b}, nil
}

// earlyProbe returns a permit for an early probe of a breaker open until
// until, when one is due (see Settings.ProbeEvery), else nil.
func (b *Breaker) earlyProbe(until time.Time) *Permit {
	if b.set.ProbeEvery <= 0 {
		return nil
	}
	now := b.now()
	b.mu.Lock()
	defer b.mu.Unlock()
	opened := until.Add(-b.set.OpenFor)
	due := opened
	if b.earlyAt.After(due) {
		due = b.earlyAt
	}
	if b.earlyBusy || now.Before(due.Add(b.set.ProbeEvery)) {
		return nil
	}
	b.earlyBusy, b.earlyAt = true, now
	return &Permit{b: b, early: true}
}

// closeEarly closes the breaker after a successful early probe: the shared
// state is replaced by a fresh closed one (unless it has left the open
// state meanwhile), or the local breaker by a new one.
func (b *Breaker) closeEarly() {
	if b.useStore() {
		err := b.closeShared()
		if err == nil {
			return
		}
		b.storeFailed(err)
	}
	if b.local.Load().State() == gobreaker.StateOpen {
		b.local.Store(b.newLocal())
	}
}

// closeShared writes a fresh closed state, made by gobreaker itself, over
// a shared state that is still open, under the record lock.
func (b *Breaker) closeShared() error {
	if err := b.store.Lock(recordLock(b.name)); err != nil {
		return err
	}
	defer func() { _ = b.store.Unlock(recordLock(b.name)) }()
	data, err := b.store.GetData(stateKey(b.name))
	if err != nil {
		return err
	}
	var cur gobreaker.SharedState
	if len(data) == 0 || json.Unmarshal(data, &cur) != nil || cur.State != gobreaker.StateOpen {
		return nil // gone, or moved on meanwhile: nothing to close
	}
	mem := &memoryStore{}
	if _, err := gobreaker.NewDistributedCircuitBreaker[struct{}](mem, b.gs); err != nil {
		return err
	}
	var fresh gobreaker.SharedState
	if err := json.Unmarshal(mem.data, &fresh); err != nil {
		return fmt.Errorf("breaker %s: fresh state: %w", b.name, err)
	}
	fresh.Generation = cur.Generation + 1
	out, err := json.Marshal(fresh)
	if err != nil {
		return err
	}
	return b.store.SetData(stateKey(b.name), out)
}

// memoryStore is a one-state gobreaker.SharedDataStore in memory, used to
// have gobreaker make a fresh state.
type memoryStore struct{ data []byte }

func (m *memoryStore) Lock(string) error                { return nil }
func (m *memoryStore) Unlock(string) error              { return nil }
func (m *memoryStore) GetData(string) ([]byte, error)   { return m.data, nil }
func (m *memoryStore) SetData(_ string, d []byte) error { m.data = d; return nil }

// Permit is one allowed call. Report its outcome with Done, once.
type Permit struct {
	b     *Breaker
	probe bool
	early bool // an early probe of an open breaker
	done  atomic.Bool
}

// Done records the call's outcome; calls after the first do nothing.
func (p *Permit) Done(o Outcome) {
	if p == nil || p.b == nil || !p.done.CompareAndSwap(false, true) {
		return
	}
	b := p.b
	if p.early {
		b.mu.Lock()
		b.earlyBusy = false
		b.mu.Unlock()
		if o == Success {
			b.closeEarly()
		}
		return // a failure changes nothing: the breaker is open
	}
	if p.probe {
		b.mu.Lock()
		b.probes--
		b.mu.Unlock()
	}
	if o == Ignored {
		return
	}
	b.record(o == Success)
}

// record counts one outcome in the shared state, or in the local one while
// the store is unreachable.
func (b *Breaker) record(success bool) {
	var callErr error
	if !success {
		callErr = errFailed
	}
	req := func() (struct{}, error) { return struct{}{}, callErr }
	if b.useStore() {
		dcb, err := b.sharedBreaker()
		if err == nil {
			err = b.recordShared(dcb, req)
			if err == nil || errors.Is(err, errFailed) || errors.Is(err, gobreaker.ErrOpenState) || errors.Is(err, gobreaker.ErrTooManyRequests) {
				return
			}
			if errors.Is(err, gobreaker.ErrNoSharedState) {
				// The state was evicted or the store flushed: start again.
				b.mu.Lock()
				b.shared = nil
				b.mu.Unlock()
			}
		}
		b.storeFailed(err)
	}
	_, _ = b.local.Load().Execute(req)
}

// recordLock names the lock held around recording an outcome.
func recordLock(name string) string { return "gobreaker:record:" + name }

// recordShared runs the distributed breaker's Execute under a lock of its
// own. gobreaker v2.4.0's Execute reads the shared state before it takes
// its lock, so two concurrent Executes would each write back an update
// based on the same read and one would be lost; holding recordLock around
// the whole read-update-write makes it atomic.
func (b *Breaker) recordShared(dcb *gobreaker.DistributedCircuitBreaker[struct{}], req func() (struct{}, error)) error {
	if err := b.store.Lock(recordLock(b.name)); err != nil {
		return err
	}
	_, err := dcb.Execute(req)
	if uerr := b.store.Unlock(recordLock(b.name)); uerr != nil && (err == nil || errors.Is(err, errFailed)) {
		err = uerr
	}
	return err
}

// sharedBreaker returns the distributed breaker, creating it (which
// initializes the shared state when there is none) on first use.
func (b *Breaker) sharedBreaker() (*gobreaker.DistributedCircuitBreaker[struct{}], error) {
	b.mu.Lock()
	dcb := b.shared
	b.mu.Unlock()
	if dcb != nil {
		return dcb, nil
	}
	b.initMu.Lock()
	defer b.initMu.Unlock()
	b.mu.Lock()
	dcb = b.shared
	b.mu.Unlock()
	if dcb != nil {
		return dcb, nil
	}
	ss := b.gs
	ss.OnStateChange = func(_ string, _, to gobreaker.State) {
		if to == gobreaker.StateOpen {
			b.tripped()
		}
	}
	dcb, err := gobreaker.NewDistributedCircuitBreaker[struct{}](b.store, ss)
	if err != nil {
		return nil, fmt.Errorf("breaker %s: shared state: %w", b.name, err)
	}
	b.mu.Lock()
	b.shared = dcb
	b.mu.Unlock()
	return dcb, nil
}

func (b *Breaker) useStore() bool {
	if b.store == nil {
		return false
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	return !b.now().Before(b.storeDown)
}

func (b *Breaker) storeFailed(err error) {
	b.mu.Lock()
	b.storeDown = b.now().Add(StoreRetry)
	b.mu.Unlock()
	if b.hooks.OnStoreError != nil {
		b.hooks.OnStoreError(err)
	}
}
