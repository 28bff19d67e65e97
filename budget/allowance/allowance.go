// Package allowance lets spend control ride out an outage of its shared
// store (Redis) within a bounded, configured amount.
//
// A Ledger sends everything to the shared ledger while it answers. When a
// call fails with a store error (not a refused budget), reservations are
// made instead on a local embedded ledger capped by the allowance: each
// process may spend at most that much per period while the shared store is
// away, whatever the teams' budgets, so a team can overspend by at most the
// allowance per replica. What was charged or journaled locally is kept in a
// pending list in the same file and carried over to the shared store once
// it answers again (by Expire, which the guard's sweep calls), so nothing
// spent is lost. Carrying over is conservative: a crash in the middle may
// charge a call twice, never zero times.
package allowance

import (
	"context"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"sync"
	"time"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// Shared is the shared store: a ledger that is also the journal.
type Shared interface {
	budget.Ledger
	budget.Journal
}

// Options configure a Ledger.
type Options struct {
	// Allowance is what this process may reserve locally per period while
	// the shared store is unreachable. Required.
	Allowance budget.Cap
	// Retry is how long after a store error the shared ledger is not
	// tried again, so an outage does not cost every call a timeout.
	// 0 means one second.
	Retry time.Duration
	// Location is the time zone of the local ledger's periods (nil: UTC).
	Location *time.Location
}

// localPrefix marks the ids of reservations held on the local ledger.
const localPrefix = "local:"

// Buckets of the local file: what is still to be carried to the shared
// store, and the caps each local reservation was asked under (the local
// ledger holds it under the allowance only).
var (
	pendingBucket = []byte("budget.outage-pending")
	capsBucket    = []byte("budget.outage-caps")
)

// pending is one thing to carry over: a charge for the shared ledger, a
// journal entry, or both.
type pending struct {
	Entry   budget.Entry `json:"entry"`
	Charge  budget.Nanos `json:"charge"`  // charge Entry's team and key this much
	Journal bool         `json:"journal"` // append Entry to the shared journal
	// Caps are the scopes whose sums the charge counts in (their limits
	// are not checked: the money is spent).
	Caps budget.Caps `json:"caps"`
}

// Ledger is a budget.Ledger and budget.Journal over a shared store with a
// local allowance; it also implements guard.SettleJournaler. Safe for
// concurrent use.
type Ledger struct {
	shared Shared
	local  *boltledger.Ledger
	db     *bbolt.DB
	opts   Options

	mu        sync.Mutex // guards downUntil
	downUntil time.Time
}

var (
	_ budget.Ledger       = (*Ledger)(nil)
	_ budget.Journal      = (*Ledger)(nil)
	_ budget.HoldReporter = (*Ledger)(nil)
)

// New wraps shared with an allowance on the local embedded file db (which
// the caller owns; the ledger uses buckets named "budget.*").
func New(shared Shared, db *bbolt.DB, opts Options) (*Ledger, error) {
	if err := opts.Allowance.Validate(); err != nil {
		return nil, fmt.Errorf("allowance: %w", err)
	}
	if opts.Retry <= 0 {
		opts.Retry = time.Second
	}
	local, err := boltledger.New(db, boltledger.Options{Location: opts.Location, Batch: true})
	if err != nil {
		return nil, err
	}
	if err := db.Update(func(tx *bbolt.Tx) error {
		for _, b := range [][]byte{pendingBucket, capsBucket} {
			if _, err := tx.CreateBucketIfNotExists(b); err != nil {
				return err
			}
		}
		return nil
	}); err != nil {
		return nil, fmt.Errorf("allowance: create bucket: %w", err)
	}
	return &Ledger{shared: shared, local: local, db: db, opts: opts}, nil
}

// storeTrouble reports whether err is the shared store failing rather than
// a verdict on the request.
func storeTrouble(err error) bool {
	return err != nil && !errors.Is(err, budget.ErrExhausted) && !errors.Is(err, budget.ErrInvalid) &&
		!errors.Is(err, budget.ErrNotHeld) && !errors.Is(err, context.Canceled)
}

func (l *Ledger) down(now time.Time) bool {
	l.mu.Lock()
	defer l.mu.Unlock()
	return now.Before(l.downUntil)
}

func (l *Ledger) markDown(now time.Time) {
	l.mu.Lock()
	defer l.mu.Unlock()
	l.downUntil = now.Add(l.opts.Retry)
}

// errDown stands for the shared store's last failure while it is skipped.
var errDown = errors.New("the shared budget store did not answer a moment ago")

// Reserve implements budget.Ledger: on the shared ledger, or, while that
// is unreachable, on the local allowance. An exhausted allowance is a
// store failure for the caller (503), not a spent budget (402).
func (l *Ledger) Reserve(ctx context.Context, now time.Time, req budget.Request) (budget.Reservation, error) {
	sharedErr := errDown
	if !l.down(now) {
		res, err := l.shared.Reserve(ctx, now, req)
		if !storeTrouble(err) {
			return res, err
		}
		l.markDown(now)
		var doubt *budget.InDoubtError
		if errors.As(err, &doubt) {
			// The shared ledger may hold it: the caller releases it there,
			// and this call is not admitted on the allowance as well.
			return budget.Reservation{}, err
		}
		sharedErr = err
	}
	local := req
	allowance := l.opts.Allowance
	local.Caps = budget.Caps{Global: &allowance}
	res, err := l.local.Reserve(ctx, now, local)
	if err != nil {
		return budget.Reservation{}, fmt.Errorf("budget store unreachable (%v) and the local outage allowance refused: %v", sharedErr, err)
	}
	raw, _ := json.Marshal(req.Caps)
	if err := l.db.Update(func(tx *bbolt.Tx) error { return tx.Bucket(capsBucket).Put([]byte(res.ID), raw) }); err != nil {
		return budget.Reservation{}, errors.Join(fmt.Errorf("allowance: note the caps: %w", err), l.cancel(ctx, now, res))
	}
	res.ID = localPrefix + res.ID
	res.Caps = req.Caps
	return res, nil
}

// cancel releases a local reservation that could not be completed.
func (l *Ledger) cancel(ctx context.Context, now time.Time, res budget.Reservation) error {
	_, err := l.local.Settle(ctx, now, res, 0)
	return err
}

func isLocal(res budget.Reservation) (budget.Reservation, bool) {
	id, ok := strings.CutPrefix(res.ID, localPrefix)
	res.ID = id
	return res, ok
}

// charged is what settling res at actual charges: the reserved amount at
// least once its lease has run out.
func charged(now time.Time, res budget.Reservation, actual budget.Nanos) budget.Nanos {
	if !now.Before(res.Deadline) {
		return max(actual, res.Amount)
	}
	return actual
}

// Settle implements budget.Ledger.
func (l *Ledger) Settle(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos) (budget.Settlement, error) {
	return l.settle(ctx, now, res, actual, nil)
}

// SettleAndAppend settles res and journals e with the charged cost, like
// boltledger's; what cannot reach the shared store is carried over later.
func (l *Ledger) SettleAndAppend(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos, e budget.Entry) (budget.Settlement, error) {
	return l.settle(ctx, now, res, actual, &e)
}

func (l *Ledger) settle(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos, e *budget.Entry) (budget.Settlement, error) {
	if lres, ok := isLocal(res); ok {
		// Carry first, then settle: a crash between the two charges the
		// call twice (the local hold expires into another carry), never
		// not at all.
		p := pending{Entry: budget.Entry{Time: now, Team: res.Team, KeyID: res.Key}, Charge: charged(now, lres, actual), Caps: res.Caps}
		if e != nil {
			p.Entry, p.Journal = *e, true
			p.Entry.Cost = p.Charge
		}
		if err := l.carry(ctx, p, lres.ID); err != nil {
			return budget.Settlement{}, err
		}
		st, err := l.local.Settle(ctx, now, lres, actual)
		if errors.Is(err, budget.ErrNotHeld) {
			return budget.Settlement{}, err // expired: Expire carried it
		}
		return st, err
	}
	st, err := l.shared.Settle(ctx, now, res, actual)
	if err != nil {
		if storeTrouble(err) {
			l.markDown(now)
		}
		if e != nil && errors.Is(err, budget.ErrNotHeld) {
			ne := *e
			ne.Cost = 0
			_ = l.Append(ctx, ne)
		}
		// A reservation left held on the shared ledger is charged in full
		// when its lease runs out there.
		return st, err
	}
	if e != nil {
		ne := *e
		ne.Cost = st.Charged
		if err := l.Append(ctx, ne); err != nil {
			return st, err
		}
	}
	return st, nil
}

// Append implements budget.Journal: to the shared journal, or carried over
// when it is unreachable.
func (l *Ledger) Append(ctx context.Context, e budget.Entry) error {
	now := time.Now()
	if !l.down(now) {
		err := l.shared.Append(ctx, e)
		if !storeTrouble(err) {
			return err
		}
		l.markDown(now)
	}
	return l.carry(ctx, pending{Entry: e, Journal: true}, "")
}

// Scan implements budget.Journal on the shared journal. Entries still
// waiting to be carried over are not in it yet.
func (l *Ledger) Scan(ctx context.Context, since time.Time, team string, fn func(budget.Entry) error) error {
	return l.shared.Scan(ctx, since, team, fn)
}

// Balance implements budget.Ledger on the shared ledger.
func (l *Ledger) Balance(ctx context.Context, now time.Time, scope budget.Scope, p budget.Period) (budget.Balance, error) {
	return l.shared.Balance(ctx, now, scope, p)
}

// TeamHolds implements budget.HoldReporter: the team's holds on the shared
// ledger (when it reports them) and on the local allowance together.
func (l *Ledger) TeamHolds(ctx context.Context, team string) (budget.Holds, error) {
	h, err := l.local.TeamHolds(ctx, team)
	if err != nil {
		return budget.Holds{}, err
	}
	if hr, ok := l.shared.(budget.HoldReporter); ok {
		sh, err := hr.TeamHolds(ctx, team)
		if err != nil {
			return budget.Holds{}, err
		}
		h.Count += sh.Count
		if sh.Until.After(h.Until) {
			h.Until = sh.Until
		}
	}
	return h, nil
}

// Expire implements budget.Ledger: it expires leases on both ledgers
// (local ones become carried charges) and then carries everything pending
// over to the shared store if it answers.
func (l *Ledger) Expire(ctx context.Context, now time.Time) ([]budget.Reservation, error) {
	var errs []error
	var out []budget.Reservation
	if !l.down(now) {
		got, err := l.shared.Expire(ctx, now)
		if storeTrouble(err) {
			l.markDown(now)
		}
		out = append(out, got...)
		errs = append(errs, err)
	}
	local, err := l.local.Expire(ctx, now)
	errs = append(errs, err)
	for _, r := range local {
		if err := l.carry(ctx, pending{Entry: budget.Entry{Time: now, Team: r.Team, KeyID: r.Key}, Charge: r.Amount, Caps: l.capsOf(r.ID)}, r.ID); err != nil {
			errs = append(errs, err)
			continue
		}
		out = append(out, r)
	}
	if !l.down(now) {
		if err := l.flush(ctx, now); err != nil {
			if storeTrouble(err) {
				l.markDown(now)
			}
			errs = append(errs, err)
		}
	}
	return out, errors.Join(errs...)
}

// Pending returns how many carries wait for the shared store.
func (l *Ledger) Pending() (int, error) {
	var n int
	err := l.db.View(func(tx *bbolt.Tx) error {
		n = tx.Bucket(pendingBucket).Stats().KeyN
		return nil
	})
	return n, err
}

// carry stores p durably for a later flush, and forgets the caps noted
// for the local reservation forget ("" for none) in the same step.
func (l *Ledger) carry(ctx context.Context, p pending, forget string) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	raw, err := json.Marshal(p)
	if err != nil {
		return err
	}
	err = l.db.Update(func(tx *bbolt.Tx) error {
		if forget != "" {
			// The reservation's caps note has served its purpose.
			if err := tx.Bucket(capsBucket).Delete([]byte(forget)); err != nil {
				return err
			}
		}
		b := tx.Bucket(pendingBucket)
		seq, err := b.NextSequence()
		if err != nil {
			return err
		}
		return b.Put(binary.BigEndian.AppendUint64(nil, seq), raw)
	})
	if err != nil {
		return fmt.Errorf("allowance: keep a charge for later: %w", err)
	}
	return nil
}

// flush carries pending charges and entries to the shared store, oldest
// first, deleting each once the store has it; it stops at the first
// failure.
func (l *Ledger) flush(ctx context.Context, now time.Time) error {
	type item struct {
		key []byte
		p   pending
	}
	var items []item
	err := l.db.View(func(tx *bbolt.Tx) error {
		return tx.Bucket(pendingBucket).ForEach(func(k, v []byte) error {
			var p pending
			if err := json.Unmarshal(v, &p); err != nil {
				return fmt.Errorf("pending %x: %w", k, err)
			}
			items = append(items, item{append([]byte(nil), k...), p})
			return nil
		})
	})
	if err != nil {
		return fmt.Errorf("allowance: read pending: %w", err)
	}
	for _, it := range items {
		if it.p.Charge > 0 {
			// An uncapped reservation settled at once is a plain charge.
			res, err := l.shared.Reserve(ctx, now, budget.Request{Team: it.p.Entry.Team, Key: it.p.Entry.KeyID, Amount: it.p.Charge, Caps: unlimited(it.p.Caps), Lease: time.Minute})
			if err != nil {
				return fmt.Errorf("allowance: carry a charge over: %w", err)
			}
			if _, err := l.shared.Settle(ctx, now, res, it.p.Charge); err != nil {
				return fmt.Errorf("allowance: carry a charge over: %w", err)
			}
		}
		if it.p.Journal {
			if err := l.shared.Append(ctx, it.p.Entry); err != nil {
				return fmt.Errorf("allowance: carry a journal entry over: %w", err)
			}
		}
		if err := l.db.Update(func(tx *bbolt.Tx) error { return tx.Bucket(pendingBucket).Delete(it.key) }); err != nil {
			return fmt.Errorf("allowance: forget a carried charge: %w", err)
		}
	}
	return nil
}

// overrides is what the shared store offers for run-time budgets.
type overrides interface {
	TeamCaps(ctx context.Context) (map[string]budget.Cap, error)
	SetTeamCap(ctx context.Context, team string, c *budget.Cap) error
}

// TeamCaps passes the shared store's run-time budgets through (none when
// it keeps none).
func (l *Ledger) TeamCaps(ctx context.Context) (map[string]budget.Cap, error) {
	if o, ok := l.shared.(overrides); ok {
		return o.TeamCaps(ctx)
	}
	return map[string]budget.Cap{}, nil
}

// SetTeamCap sets a run-time budget on the shared store.
func (l *Ledger) SetTeamCap(ctx context.Context, team string, c *budget.Cap) error {
	if o, ok := l.shared.(overrides); ok {
		return o.SetTeamCap(ctx, team, c)
	}
	return errors.New("allowance: the shared store keeps no run-time budgets")
}

// capsOf returns the caps noted for local reservation id (zero if none).
func (l *Ledger) capsOf(id string) budget.Caps {
	var c budget.Caps
	_ = l.db.View(func(tx *bbolt.Tx) error {
		if raw := tx.Bucket(capsBucket).Get([]byte(id)); raw != nil {
			_ = json.Unmarshal(raw, &c)
		}
		return nil
	})
	return c
}

// unlimited keeps c's scopes and periods with limits that never refuse,
// so a carried charge counts in the right sums without being checked.
func unlimited(c budget.Caps) budget.Caps {
	open := func(cp *budget.Cap) *budget.Cap {
		if cp == nil {
			return nil
		}
		return &budget.Cap{Limit: budget.MaxNanos, Period: cp.Period}
	}
	return budget.Caps{Team: open(c.Team), Key: open(c.Key), Global: open(c.Global)}
}
