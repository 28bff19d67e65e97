// Package boltledger is the embedded budget backend: a budget.Ledger and a
// budget.Journal kept in a bbolt file, normally the same file as the cache
// store, so a single machine needs nothing else.
//
// Every charge is counted in every period (day, week, month, total) of its
// key's, its team's and the global sums, whatever caps it was checked
// against (budget.Caps.Holds), so a budget given another period, or set
// where there was none, finds what was already spent in its period.
//
// The ledger uses only buckets whose names start with "budget." and never
// closes the *bbolt.DB it is given. Every operation is one bbolt read-write
// transaction; bbolt has a single writer, so each operation is atomic with
// respect to every other one, and a transaction that committed survives a
// crash of the process (bbolt syncs the file on commit unless the DB was
// opened with NoSync).
package boltledger

import (
	"bytes"
	"context"
	"crypto/rand"
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"time"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
)

// Bucket names, all prefixed "budget." so they never meet the cache's.
var (
	sumsBucket    = []byte("budget.sums")         // field -> spent(8) held(8)
	holdsBucket   = []byte("budget.reservations") // id -> JSON record
	leasesBucket  = []byte("budget.leases")       // deadline(8) id -> empty
	journalBucket = []byte("budget.journal")      // time(8) seq(8) -> JSON entry
	capsBucket    = []byte("budget.team-caps")    // team -> JSON budget.Cap set at run time
)

// Options configure a Ledger. The zero value is usable.
type Options struct {
	// Location is the time zone budget periods follow. Nil means UTC.
	Location *time.Location
	// Update, when set, runs every write transaction; give it a group
	// committer shared with the file's other writers (the proxy uses
	// cache/boltgroup) so concurrent writes share one fsync. Functions
	// passed to it may run more than once. Nil means Batch decides.
	Update func(func(*bbolt.Tx) error) error
	// Batch, without Update, writes through bbolt's DB.Batch (concurrent
	// writers share commits, a lone one waits up to MaxBatchDelay); false
	// means one transaction per operation.
	Batch bool
}

// Ledger is a budget.Ledger and budget.Journal on a bbolt database. It is
// safe for concurrent use; several Ledgers may share one DB.
type Ledger struct {
	db    *bbolt.DB
	loc   *time.Location
	write func(func(*bbolt.Tx) error) error
}

var (
	_ budget.Ledger       = (*Ledger)(nil)
	_ budget.Journal      = (*Ledger)(nil)
	_ budget.HoldReporter = (*Ledger)(nil)
)

// New returns a Ledger on db, creating its buckets if needed. The caller
// keeps ownership of db and closes it after the Ledger's last use.
func New(db *bbolt.DB, opts Options) (*Ledger, error) {
	loc := opts.Location
	if loc == nil {
		loc = time.UTC
	}
	err := db.Update(func(tx *bbolt.Tx) error {
		for _, b := range [][]byte{sumsBucket, holdsBucket, leasesBucket, journalBucket, capsBucket} {
			if _, err := tx.CreateBucketIfNotExists(b); err != nil {
				return err
			}
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("boltledger: create buckets: %w", err)
	}
	l := &Ledger{db: db, loc: loc, write: opts.Update}
	if l.write == nil {
		l.write = db.Update
		if opts.Batch {
			l.write = db.Batch
		}
	}
	return l, nil
}

// update runs fn in a read-write transaction, shared with concurrent
// callers if so configured. fn may run more than once (DB.Batch and group
// committers retry), so it must start from scratch each time.
func (l *Ledger) update(fn func(*bbolt.Tx) error) error {
	return l.write(fn)
}

// record is what the ledger keeps for one reservation.
type record struct {
	Res    budget.Reservation // as returned by Reserve
	Fields []string           // sums fields held against (budget.Caps.Holds)
	Limits []budget.Nanos     // the cap of each field; budget.NoLimit when uncapped
}

// Reserve implements budget.Ledger.
func (l *Ledger) Reserve(ctx context.Context, now time.Time, req budget.Request) (budget.Reservation, error) {
	if err := req.Validate(); err != nil {
		return budget.Reservation{}, err
	}
	if err := ctx.Err(); err != nil {
		return budget.Reservation{}, err
	}
	local, global := req.Caps.Holds(req.Team, req.Key, now, l.loc)
	holds := append(local, global...)
	rec := record{Res: budget.Reservation{
		ID: rand.Text(), Team: req.Team, Key: req.Key, Amount: req.Amount, Caps: req.Caps,
		Created: now, Deadline: now.Add(req.Lease).Truncate(time.Millisecond), Remaining: -1,
	}}
	err := l.update(func(tx *bbolt.Tx) error {
		rec.Fields, rec.Limits, rec.Res.Remaining = nil, nil, -1
		sums := tx.Bucket(sumsBucket)
		for _, h := range holds {
			if !h.Capped() {
				continue
			}
			spent, held := getSums(sums, h.Field)
			if left := h.Limit - spent - held; left < req.Amount {
				return h.Exhausted(left, req.Amount)
			}
		}
		for _, h := range holds {
			spent, held := getSums(sums, h.Field)
			held += req.Amount
			if err := putSums(sums, h.Field, spent, held); err != nil {
				return err
			}
			if left := h.Limit - spent - held; h.Capped() && (rec.Res.Remaining < 0 || left < rec.Res.Remaining) {
				rec.Res.Remaining = left
			}
			rec.Fields = append(rec.Fields, h.Field)
			rec.Limits = append(rec.Limits, h.Limit)
		}
		return putRecord(tx, rec)
	})
	var ex *budget.ExhaustedError
	if errors.As(err, &ex) {
		return budget.Reservation{}, ex
	}
	if err != nil {
		return budget.Reservation{}, fmt.Errorf("boltledger: reserve: %w", err)
	}
	return rec.Res, nil
}

// Settle implements budget.Ledger.
func (l *Ledger) Settle(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos) (budget.Settlement, error) {
	return l.settle(ctx, now, res, actual, nil)
}

// SettleAndAppend settles res like Settle and appends e to the journal in
// the same transaction, so the pair costs one sync instead of two. e.Cost
// is set to the amount charged; when res is no longer held (the sweep
// charged it), e is appended with Cost 0 and ErrNotHeld returned.
func (l *Ledger) SettleAndAppend(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos, e budget.Entry) (budget.Settlement, error) {
	return l.settle(ctx, now, res, actual, &e)
}

// settle settles res, and appends e (when not nil) in the same
// transaction.
func (l *Ledger) settle(ctx context.Context, now time.Time, res budget.Reservation, actual budget.Nanos, e *budget.Entry) (budget.Settlement, error) {
	if err := budget.CheckActual(actual); err != nil {
		return budget.Settlement{}, err
	}
	if err := ctx.Err(); err != nil {
		return budget.Settlement{}, err
	}
	var out budget.Settlement
	var notHeld bool
	err := l.update(func(tx *bbolt.Tx) error {
		out, notHeld = budget.Settlement{}, false
		raw := tx.Bucket(holdsBucket).Get([]byte(res.ID))
		if raw == nil {
			if e == nil {
				return budget.ErrNotHeld
			}
			notHeld = true
			ne := *e
			ne.Cost = 0
			return appendLocked(tx, ne)
		}
		var rec record
		if err := json.Unmarshal(raw, &rec); err != nil {
			return fmt.Errorf("decode reservation %s: %w", res.ID, err)
		}
		charged := actual
		if !now.Before(rec.Res.Deadline) {
			out.Expired = true
			charged = max(charged, rec.Res.Amount)
		}
		out.Charged = charged
		out.Released = max(rec.Res.Amount-charged, 0)
		var err error
		if out.Remaining, err = l.chargeLocked(tx, rec, charged); err != nil {
			return err
		}
		if e != nil {
			ne := *e
			ne.Cost = charged
			return appendLocked(tx, ne)
		}
		return nil
	})
	if notHeld || errors.Is(err, budget.ErrNotHeld) {
		if err != nil && !errors.Is(err, budget.ErrNotHeld) {
			return budget.Settlement{}, fmt.Errorf("boltledger: settle: %w", err)
		}
		return budget.Settlement{}, budget.ErrNotHeld
	}
	if err != nil {
		return budget.Settlement{}, fmt.Errorf("boltledger: settle: %w", err)
	}
	return out, nil
}

// chargeLocked moves rec's hold to spent as charged, deletes rec and
// returns the least remaining budget across its caps (-1 if none). It runs
// inside a read-write transaction.
func (l *Ledger) chargeLocked(tx *bbolt.Tx, rec record, charged budget.Nanos) (budget.Nanos, error) {
	sums := tx.Bucket(sumsBucket)
	remaining := budget.Nanos(-1)
	for i, f := range rec.Fields {
		spent, held := getSums(sums, f)
		spent += charged
		held -= rec.Res.Amount
		if err := putSums(sums, f, spent, held); err != nil {
			return 0, err
		}
		if rec.Limits[i] < 0 {
			continue // counted, not capped
		}
		left := max(rec.Limits[i]-spent-held, 0)
		if remaining < 0 || left < remaining {
			remaining = left
		}
	}
	if err := tx.Bucket(holdsBucket).Delete([]byte(rec.Res.ID)); err != nil {
		return 0, err
	}
	if err := tx.Bucket(leasesBucket).Delete(leaseKey(rec.Res.Deadline, rec.Res.ID)); err != nil {
		return 0, err
	}
	return remaining, nil
}

// Expire implements budget.Ledger.
func (l *Ledger) Expire(ctx context.Context, now time.Time) ([]budget.Reservation, error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	var out []budget.Reservation
	err := l.update(func(tx *bbolt.Tx) error {
		out = out[:0]
		var due [][]byte
		c := tx.Bucket(leasesBucket).Cursor()
		limit := leaseKey(now, "")
		for k, _ := c.First(); k != nil && bytes.Compare(k[:8], limit[:8]) <= 0; k, _ = c.Next() {
			due = append(due, bytes.Clone(k))
		}
		for _, k := range due {
			id := k[8:]
			raw := tx.Bucket(holdsBucket).Get(id)
			if raw == nil {
				if err := tx.Bucket(leasesBucket).Delete(k); err != nil {
					return err
				}
				continue
			}
			var rec record
			if err := json.Unmarshal(raw, &rec); err != nil {
				return fmt.Errorf("decode reservation %s: %w", id, err)
			}
			if _, err := l.chargeLocked(tx, rec, rec.Res.Amount); err != nil {
				return err
			}
			out = append(out, rec.Res)
		}
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("boltledger: expire: %w", err)
	}
	return out, nil
}

// Balance implements budget.Ledger.
func (l *Ledger) Balance(ctx context.Context, now time.Time, scope budget.Scope, p budget.Period) (budget.Balance, error) {
	if err := budget.ValidateScope(scope); err != nil {
		return budget.Balance{}, err
	}
	if err := p.Validate(); err != nil {
		return budget.Balance{}, fmt.Errorf("%w: %w", budget.ErrInvalid, err)
	}
	if err := ctx.Err(); err != nil {
		return budget.Balance{}, err
	}
	var b budget.Balance
	err := l.db.View(func(tx *bbolt.Tx) error {
		b.Spent, b.Held = getSums(tx.Bucket(sumsBucket), scope.Field(p, now, l.loc))
		return nil
	})
	if err != nil {
		return budget.Balance{}, fmt.Errorf("boltledger: balance: %w", err)
	}
	return b, nil
}

// TeamHolds implements budget.HoldReporter: the team's reservations not
// settled yet and the latest of their lease deadlines.
func (l *Ledger) TeamHolds(ctx context.Context, team string) (budget.Holds, error) {
	if err := budget.ValidateName(team); err != nil {
		return budget.Holds{}, err
	}
	if err := ctx.Err(); err != nil {
		return budget.Holds{}, err
	}
	var h budget.Holds
	err := l.db.View(func(tx *bbolt.Tx) error {
		return tx.Bucket(holdsBucket).ForEach(func(_, raw []byte) error {
			var rec record
			if err := json.Unmarshal(raw, &rec); err != nil {
				return err
			}
			if rec.Res.Team == team {
				h.Count++
				if rec.Res.Deadline.After(h.Until) {
					h.Until = rec.Res.Deadline
				}
			}
			return nil
		})
	})
	if err != nil {
		return budget.Holds{}, fmt.Errorf("boltledger: holds of team %q: %w", team, err)
	}
	return h, nil
}

// Append implements budget.Journal.
func (l *Ledger) Append(ctx context.Context, e budget.Entry) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	if err := l.update(func(tx *bbolt.Tx) error { return appendLocked(tx, e) }); err != nil {
		return fmt.Errorf("boltledger: append journal entry: %w", err)
	}
	return nil
}

// appendLocked adds e to the journal inside a read-write transaction.
func appendLocked(tx *bbolt.Tx, e budget.Entry) error {
	raw, err := json.Marshal(e)
	if err != nil {
		return fmt.Errorf("encode journal entry: %w", err)
	}
	b := tx.Bucket(journalBucket)
	seq, err := b.NextSequence()
	if err != nil {
		return err
	}
	k := make([]byte, 16)
	binary.BigEndian.PutUint64(k, timeKey(e.Time))
	binary.BigEndian.PutUint64(k[8:], seq)
	return b.Put(k, raw)
}

// Scan implements budget.Journal. Entries come in time order.
func (l *Ledger) Scan(ctx context.Context, since time.Time, team string, fn func(budget.Entry) error) error {
	start := make([]byte, 8)
	binary.BigEndian.PutUint64(start, timeKey(since))
	return l.db.View(func(tx *bbolt.Tx) error {
		c := tx.Bucket(journalBucket).Cursor()
		for k, v := c.Seek(start); k != nil; k, v = c.Next() {
			if err := ctx.Err(); err != nil {
				return err
			}
			var e budget.Entry
			if err := json.Unmarshal(v, &e); err != nil {
				return fmt.Errorf("boltledger: decode journal entry: %w", err)
			}
			if team != "" && e.Team != team {
				continue
			}
			if err := fn(e); err != nil {
				return err
			}
		}
		return nil
	})
}

// timeKey maps t to a uint64 that sorts like t, dates before 1970 included.
func timeKey(t time.Time) uint64 { return uint64(t.UnixNano()) ^ 1<<63 }

func leaseKey(deadline time.Time, id string) []byte {
	k := make([]byte, 8, 8+len(id))
	binary.BigEndian.PutUint64(k, timeKey(deadline))
	return append(k, id...)
}

func getSums(b *bbolt.Bucket, field string) (spent, held budget.Nanos) {
	v := b.Get([]byte(field))
	if len(v) != 16 {
		return 0, 0
	}
	return budget.Nanos(binary.BigEndian.Uint64(v)), budget.Nanos(binary.BigEndian.Uint64(v[8:]))
}

func putSums(b *bbolt.Bucket, field string, spent, held budget.Nanos) error {
	v := make([]byte, 16)
	binary.BigEndian.PutUint64(v, uint64(spent))
	binary.BigEndian.PutUint64(v[8:], uint64(held))
	return b.Put([]byte(field), v)
}

func putRecord(tx *bbolt.Tx, rec record) error {
	raw, err := json.Marshal(rec)
	if err != nil {
		return err
	}
	if err := tx.Bucket(holdsBucket).Put([]byte(rec.Res.ID), raw); err != nil {
		return err
	}
	return tx.Bucket(leasesBucket).Put(leaseKey(rec.Res.Deadline, rec.Res.ID), nil)
}
