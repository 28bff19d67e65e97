// Package ledgertest is the conformance suite every budget.Ledger (and
// budget.Journal) backend passes: reserve and settle arithmetic, refusals
// per scope, calendar periods, lease expiry, exact accounting under 64
// concurrent clients on several ledger instances, and the spend journal.
package ledgertest

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"github.com/stintlab/stint/budget"
)

// Store is what a backend under test provides: a Ledger that is also a
// Journal.
type Store interface {
	budget.Ledger
	budget.Journal
}

// Open prepares a fresh, empty store for one test, with budget periods in
// loc, and returns a function that opens another Store instance on it each
// time it is called (instances share all data, like several processes on
// one Redis). Everything is released when t ends.
type Open func(t *testing.T, loc *time.Location) (instance func() Store)

// Run runs the whole suite against the backend open makes.
func Run(t *testing.T, open Open) {
	t.Run("ReserveSettle", func(t *testing.T) { testReserveSettle(t, open) })
	t.Run("Exhausted", func(t *testing.T) { testExhausted(t, open) })
	t.Run("NotHeld", func(t *testing.T) { testNotHeld(t, open) })
	t.Run("Invalid", func(t *testing.T) { testInvalid(t, open) })
	t.Run("Periods", func(t *testing.T) { testPeriods(t, open) })
	t.Run("Expire", func(t *testing.T) { testExpire(t, open) })
	t.Run("ExpireOnce", func(t *testing.T) { testExpireOnce(t, open) })
	t.Run("NoOverspendTeam", func(t *testing.T) { testNoOverspend(t, open, false) })
	t.Run("NoOverspendGlobal", func(t *testing.T) { testNoOverspend(t, open, true) })
	t.Run("Journal", func(t *testing.T) { testJournal(t, open) })
	t.Run("EveryPeriodCounts", func(t *testing.T) { testEveryPeriodCounts(t, open) })
	t.Run("LaterCapCountsSpend", func(t *testing.T) { testLaterCapCountsSpend(t, open) })
}

// testEveryPeriodCounts charges reservations checked against no cap, or
// against a cap on one period only, and reads every period's sum of the
// key, the team and the global scope: each holds all of it, so a budget
// that later takes another period finds it.
func testEveryPeriodCounts(t *testing.T, open Open) {
	ctx := context.Background()
	l := open(t, nil)()
	for _, caps := range []budget.Caps{{}, {Team: dayCap(1000)}, {Key: &budget.Cap{Limit: 1000, Period: budget.Month}, Global: &budget.Cap{Limit: 1000, Period: budget.Week}}} {
		res, err := l.Reserve(ctx, t0, req("lab", "k1", 100, caps))
		if err != nil {
			t.Fatalf("Reserve under %+v: %v", caps, err)
		}
		if _, err := l.Settle(ctx, t0, res, 60); err != nil {
			t.Fatalf("Settle: %v", err)
		}
	}
	held, err := l.Reserve(ctx, t0, req("lab", "k1", 25, budget.Caps{}))
	if err != nil {
		t.Fatalf("Reserve: %v", err)
	}
	for _, p := range budget.Periods {
		for _, s := range []budget.Scope{{Team: "lab", Key: "k1"}, {Team: "lab"}} {
			if got := balance(t, l, t0, s, p); got != (budget.Balance{Spent: 180, Held: 25}) {
				t.Errorf("%v this %s = %+v, want spent 180, held 25", s, p, got)
			}
		}
		if got := balance(t, l, t0, budget.Scope{}, p); got.Spent != 180 {
			t.Errorf("global this %s = %+v, want spent 180", p, got)
		}
	}
	if _, err := l.Settle(ctx, t0, held, 0); err != nil {
		t.Fatalf("Settle: %v", err)
	}
}

// testLaterCapCountsSpend spends without caps, then asks under a cap of
// each scope: the cap refuses with only what the earlier spend left.
func testLaterCapCountsSpend(t *testing.T, open Open) {
	tests := []struct {
		name  string
		caps  budget.Caps
		scope budget.Scope
	}{
		{"key", budget.Caps{Key: &budget.Cap{Limit: 1000, Period: budget.Week}}, budget.Scope{Team: "lab", Key: "k1"}},
		{"team", budget.Caps{Team: &budget.Cap{Limit: 1000, Period: budget.Month}}, budget.Scope{Team: "lab"}},
		{"global", budget.Caps{Global: &budget.Cap{Limit: 1000, Period: budget.Total}}, budget.Scope{}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			ctx := context.Background()
			l := open(t, nil)()
			for _, team := range []string{"lab", "kiln"} { // the global cap counts both
				res, err := l.Reserve(ctx, t0, req(team, "k1", 400, budget.Caps{}))
				if err != nil {
					t.Fatalf("Reserve: %v", err)
				}
				if _, err := l.Settle(ctx, t0, res, 350); err != nil {
					t.Fatalf("Settle: %v", err)
				}
			}
			want := budget.Nanos(650) // 1000 - 350
			if tt.scope.Team == "" {
				want = 300 // 1000 - 2×350
			}
			_, err := l.Reserve(ctx, t0.Add(time.Hour), req("lab", "k1", want+1, tt.caps))
			var ex *budget.ExhaustedError
			if !errors.As(err, &ex) || ex.Scope != tt.scope || ex.Remaining != want {
				t.Fatalf("Reserve of %d under a new %s cap: %v, want the cap refusing with %d left", want+1, tt.name, err, want)
			}
			res, err := l.Reserve(ctx, t0.Add(time.Hour), req("lab", "k1", want, tt.caps))
			if err != nil {
				t.Fatalf("Reserve of exactly what is left: %v", err)
			}
			if res.Remaining != 0 {
				t.Errorf("Remaining = %d, want 0", res.Remaining)
			}
		})
	}
}

// t0 is a Wednesday noon in UTC.
var t0 = time.Date(2026, 3, 4, 12, 0, 0, 0, time.UTC)

const usd = budget.NanosPerUSD

func dayCap(limit budget.Nanos) *budget.Cap { return &budget.Cap{Limit: limit, Period: budget.Day} }

func req(team, key string, amount budget.Nanos, caps budget.Caps) budget.Request {
	return budget.Request{Team: team, Key: key, Amount: amount, Caps: caps, Lease: time.Minute}
}

// balance fails the test on error.
func balance(t *testing.T, l budget.Ledger, now time.Time, s budget.Scope, p budget.Period) budget.Balance {
	t.Helper()
	b, err := l.Balance(context.Background(), now, s, p)
	if err != nil {
		t.Fatalf("Balance(%v, %s): %v", s, p, err)
	}
	return b
}

func testReserveSettle(t *testing.T, open Open) {
	tests := []struct {
		name         string
		amount       budget.Nanos
		actual       budget.Nanos
		wantCharged  budget.Nanos
		wantReleased budget.Nanos
	}{
		{"under", 100, 40, 40, 60},
		{"exact", 100, 100, 100, 0},
		{"nothing billed", 100, 0, 0, 100},
		{"overrun is charged", 100, 130, 130, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			ctx := context.Background()
			l := open(t, nil)()
			caps := budget.Caps{Team: dayCap(1000), Key: dayCap(500)}
			res, err := l.Reserve(ctx, t0, req("lab", "k1", tt.amount, caps))
			if err != nil {
				t.Fatalf("Reserve: %v", err)
			}
			if res.ID == "" || res.Amount != tt.amount || res.Team != "lab" || res.Key != "k1" {
				t.Errorf("Reserve = %+v, want an id, amount %d, team lab, key k1", res, tt.amount)
			}
			if got, want := res.Deadline, t0.Add(time.Minute); !got.Equal(want) {
				t.Errorf("Deadline = %v, want %v", got, want)
			}
			if got, want := res.Remaining, 500-tt.amount; got != want {
				t.Errorf("Reservation.Remaining = %d, want %d (key cap is tighter)", got, want)
			}
			for _, s := range []budget.Scope{{Team: "lab"}, {Team: "lab", Key: "k1"}} {
				if got := balance(t, l, t0, s, budget.Day); got != (budget.Balance{Held: tt.amount}) {
					t.Errorf("%v after Reserve = %+v, want held %d", s, got, tt.amount)
				}
			}
			st, err := l.Settle(ctx, t0.Add(time.Second), res, tt.actual)
			if err != nil {
				t.Fatalf("Settle: %v", err)
			}
			want := budget.Settlement{Charged: tt.wantCharged, Released: tt.wantReleased, Remaining: max(500-tt.wantCharged, 0)}
			if st != want {
				t.Errorf("Settle = %+v, want %+v", st, want)
			}
			for _, s := range []budget.Scope{{Team: "lab"}, {Team: "lab", Key: "k1"}} {
				if got := balance(t, l, t0, s, budget.Day); got != (budget.Balance{Spent: tt.wantCharged}) {
					t.Errorf("%v after Settle = %+v, want spent %d", s, got, tt.wantCharged)
				}
			}
		})
	}
	t.Run("uncapped", func(t *testing.T) {
		l := open(t, nil)()
		res, err := l.Reserve(context.Background(), t0, req("lab", "", 7, budget.Caps{}))
		if err != nil {
			t.Fatalf("Reserve: %v", err)
		}
		if res.Remaining != -1 {
			t.Errorf("Remaining = %d, want -1 without caps", res.Remaining)
		}
		st, err := l.Settle(context.Background(), t0, res, 5)
		if err != nil || st.Charged != 5 || st.Remaining != -1 {
			t.Errorf("Settle = %+v, %v; want charged 5, remaining -1", st, err)
		}
	})
}

func testExhausted(t *testing.T, open Open) {
	// Spend 600 first (team lab, key k1), then ask for 500 more.
	tests := []struct {
		name      string
		caps      budget.Caps
		wantScope budget.Scope
		wantLimit budget.Nanos
		wantLeft  budget.Nanos
	}{
		{"key", budget.Caps{Key: dayCap(1000), Team: dayCap(5000), Global: dayCap(5000)}, budget.Scope{Team: "lab", Key: "k1"}, 1000, 400},
		{"team", budget.Caps{Key: dayCap(5000), Team: dayCap(900), Global: dayCap(5000)}, budget.Scope{Team: "lab"}, 900, 300},
		{"global", budget.Caps{Key: dayCap(5000), Team: dayCap(5000), Global: dayCap(1050)}, budget.Scope{}, 1050, 450},
		{"zero limit", budget.Caps{Team: dayCap(600)}, budget.Scope{Team: "lab"}, 600, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			ctx := context.Background()
			l := open(t, nil)()
			first, err := l.Reserve(ctx, t0, req("lab", "k1", 600, tt.caps))
			if err != nil {
				t.Fatalf("first Reserve: %v", err)
			}
			if _, err := l.Settle(ctx, t0, first, 600); err != nil {
				t.Fatalf("Settle: %v", err)
			}
			_, err = l.Reserve(ctx, t0, req("lab", "k1", 500, tt.caps))
			var ex *budget.ExhaustedError
			if !errors.As(err, &ex) || !errors.Is(err, budget.ErrExhausted) {
				t.Fatalf("second Reserve error = %v, want an *ExhaustedError", err)
			}
			want := budget.ExhaustedError{Scope: tt.wantScope, Period: budget.Day, Limit: tt.wantLimit, Remaining: tt.wantLeft, Requested: 500}
			if *ex != want {
				t.Errorf("ExhaustedError = %+v, want %+v", *ex, want)
			}
			scopes := []budget.Scope{{Team: "lab"}}
			if tt.caps.Key != nil {
				scopes = append(scopes, budget.Scope{Team: "lab", Key: "k1"})
			}
			if tt.caps.Global != nil {
				scopes = append(scopes, budget.Scope{})
			}
			for _, s := range scopes {
				if got := balance(t, l, t0, s, budget.Day); got != (budget.Balance{Spent: 600}) {
					t.Errorf("%v after refusal = %+v, want spent 600 and nothing held", s, got)
				}
			}
			// What is left still fits.
			if _, err := l.Reserve(ctx, t0, req("lab", "k1", tt.wantLeft, tt.caps)); err != nil {
				t.Errorf("Reserve of the remaining %d: %v", tt.wantLeft, err)
			}
		})
	}
}

func testNotHeld(t *testing.T, open Open) {
	ctx := context.Background()
	l := open(t, nil)()
	res, err := l.Reserve(ctx, t0, req("lab", "", 100, budget.Caps{Team: dayCap(1000), Global: dayCap(1000)}))
	if err != nil {
		t.Fatalf("Reserve: %v", err)
	}
	if _, err := l.Settle(ctx, t0, res, 10); err != nil {
		t.Fatalf("Settle: %v", err)
	}
	if _, err := l.Settle(ctx, t0, res, 10); !errors.Is(err, budget.ErrNotHeld) {
		t.Errorf("second Settle error = %v, want ErrNotHeld", err)
	}
	bogus := res
	bogus.ID = "no-such-reservation"
	if _, err := l.Settle(ctx, t0, bogus, 10); !errors.Is(err, budget.ErrNotHeld) {
		t.Errorf("Settle of an unknown id: error = %v, want ErrNotHeld", err)
	}
	for _, s := range []budget.Scope{{}, {Team: "lab"}} {
		if got := balance(t, l, t0, s, budget.Day); got != (budget.Balance{Spent: 10}) {
			t.Errorf("%v = %+v, want spent 10 once", s, got)
		}
	}
}

func testInvalid(t *testing.T, open Open) {
	ctx := context.Background()
	l := open(t, nil)()
	good := req("lab", "k1", 10, budget.Caps{Team: dayCap(100)})
	tests := []struct {
		name string
		edit func(*budget.Request)
	}{
		{"empty team", func(r *budget.Request) { r.Team = "" }},
		{"brace in team", func(r *budget.Request) { r.Team = "a{b}" }},
		{"space in team", func(r *budget.Request) { r.Team = "a b" }},
		{"bar in key", func(r *budget.Request) { r.Key = "a|b" }},
		{"negative amount", func(r *budget.Request) { r.Amount = -1 }},
		{"amount above MaxNanos", func(r *budget.Request) { r.Amount = budget.MaxNanos + 1 }},
		{"zero lease", func(r *budget.Request) { r.Lease = 0 }},
		{"negative limit", func(r *budget.Request) { r.Caps.Team = dayCap(-5) }},
		{"bad period", func(r *budget.Request) { r.Caps.Team = &budget.Cap{Limit: 5, Period: "fortnight"} }},
		{"key cap without key", func(r *budget.Request) { r.Key = ""; r.Caps.Key = dayCap(5) }},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r := good
			tt.edit(&r)
			if _, err := l.Reserve(ctx, t0, r); !errors.Is(err, budget.ErrInvalid) {
				t.Errorf("Reserve(%+v) error = %v, want ErrInvalid", r, err)
			}
		})
	}
	res, err := l.Reserve(ctx, t0, good)
	if err != nil {
		t.Fatalf("Reserve(good): %v", err)
	}
	if _, err := l.Settle(ctx, t0, res, -1); !errors.Is(err, budget.ErrInvalid) {
		t.Errorf("Settle(-1) error = %v, want ErrInvalid", err)
	}
	if _, err := l.Balance(ctx, t0, budget.Scope{Key: "k1"}, budget.Day); !errors.Is(err, budget.ErrInvalid) {
		t.Errorf("Balance of a key without team: error = %v, want ErrInvalid", err)
	}
	if _, err := l.Balance(ctx, t0, budget.Scope{Team: "lab"}, "year"); !errors.Is(err, budget.ErrInvalid) {
		t.Errorf("Balance with period year: error = %v, want ErrInvalid", err)
	}
}

func testPeriods(t *testing.T, open Open) {
	// The ledger runs in UTC+05:30; 2026-03-01 is a Sunday.
	loc := time.FixedZone("lab time", 5*3600+1800)
	tests := []struct {
		period   budget.Period
		before   time.Time // just before a boundary, local time
		after    time.Time // just after it
		sameSpan time.Time // later, same period as after
	}{
		{budget.Day, time.Date(2026, 3, 1, 23, 59, 0, 0, loc), time.Date(2026, 3, 2, 0, 1, 0, 0, loc), time.Date(2026, 3, 2, 23, 0, 0, 0, loc)},
		{budget.Week, time.Date(2026, 3, 1, 23, 59, 0, 0, loc), time.Date(2026, 3, 2, 0, 1, 0, 0, loc), time.Date(2026, 3, 8, 23, 0, 0, 0, loc)},
		{budget.Month, time.Date(2026, 2, 28, 23, 59, 0, 0, loc), time.Date(2026, 3, 1, 0, 1, 0, 0, loc), time.Date(2026, 3, 31, 23, 0, 0, 0, loc)},
	}
	for _, tt := range tests {
		t.Run(string(tt.period), func(t *testing.T) {
			ctx := context.Background()
			l := open(t, loc)()
			caps := budget.Caps{Team: &budget.Cap{Limit: 100, Period: tt.period}}
			team := budget.Scope{Team: "lab"}
			r := req("lab", "", 100, caps)
			r.Lease = time.Hour // settled before its deadline
			res, err := l.Reserve(ctx, tt.before, r)
			if err != nil {
				t.Fatalf("Reserve before the boundary: %v", err)
			}
			// Settled after the boundary, the charge still belongs to the
			// period the reservation was made in.
			if _, err := l.Settle(ctx, tt.after, res, 70); err != nil {
				t.Fatalf("Settle: %v", err)
			}
			if got := balance(t, l, tt.before, team, tt.period); got.Spent != 70 {
				t.Errorf("old period spent = %d, want 70", got.Spent)
			}
			if got := balance(t, l, tt.after, team, tt.period); got != (budget.Balance{}) {
				t.Errorf("new period = %+v, want empty", got)
			}
			// The whole limit is available again after the boundary.
			res2, err := l.Reserve(ctx, tt.after, req("lab", "", 100, caps))
			if err != nil {
				t.Fatalf("Reserve of the full limit after the boundary: %v", err)
			}
			if _, err := l.Settle(ctx, tt.after, res2, 100); err != nil {
				t.Fatalf("Settle: %v", err)
			}
			if _, err := l.Reserve(ctx, tt.sameSpan, req("lab", "", 1, caps)); !errors.Is(err, budget.ErrExhausted) {
				t.Errorf("Reserve later in the same %s: error = %v, want ErrExhausted", tt.period, err)
			}
			// Every charge counts in every period, capped or not.
			if got := balance(t, l, tt.before, team, budget.Total); got != (budget.Balance{Spent: 170}) {
				t.Errorf("total sum = %+v, want spent 170 (every charge counts in every period)", got)
			}
		})
	}
}

func testExpire(t *testing.T, open Open) {
	ctx := context.Background()
	l := open(t, nil)()
	caps := budget.Caps{Team: dayCap(10 * usd), Global: dayCap(10 * usd)}
	var held []budget.Reservation
	for i, lease := range []time.Duration{time.Second, 2 * time.Second, 3 * time.Second} {
		r := req("lab", "", budget.Nanos(100*(i+1)), caps)
		r.Lease = lease
		res, err := l.Reserve(ctx, t0, r)
		if err != nil {
			t.Fatalf("Reserve: %v", err)
		}
		held = append(held, res)
	}
	if got, err := l.Expire(ctx, t0.Add(999*time.Millisecond)); err != nil || len(got) != 0 {
		t.Fatalf("Expire before any deadline = %v, %v; want none", got, err)
	}
	got, err := l.Expire(ctx, t0.Add(time.Second)) // exactly the first deadline
	if err != nil {
		t.Fatalf("Expire: %v", err)
	}
	if len(got) != 1 || got[0].ID != held[0].ID || got[0].Amount != 100 {
		t.Fatalf("Expire at the first deadline = %+v, want reservation %s of 100", got, held[0].ID)
	}
	for _, s := range []budget.Scope{{}, {Team: "lab"}} {
		if b := balance(t, l, t0, s, budget.Day); b != (budget.Balance{Spent: 100, Held: 500}) {
			t.Errorf("%v after first expiry = %+v, want spent 100 held 500", s, b)
		}
	}
	// The expired holder comes back: it is not refunded.
	if _, err := l.Settle(ctx, t0.Add(time.Second), held[0], 1); !errors.Is(err, budget.ErrNotHeld) {
		t.Errorf("Settle after expiry: error = %v, want ErrNotHeld", err)
	}
	// Settling past the deadline before any sweep charges at least the
	// reserved amount.
	st, err := l.Settle(ctx, t0.Add(2*time.Second), held[1], 50)
	if err != nil {
		t.Fatalf("late Settle: %v", err)
	}
	if want := (budget.Settlement{Charged: 200, Expired: true, Remaining: 10*usd - 300 - 300}); st != want {
		t.Errorf("late Settle = %+v, want %+v", st, want)
	}
	// A late overrun is charged in full.
	st, err = l.Settle(ctx, t0.Add(time.Hour), held[2], 450)
	if err != nil || st.Charged != 450 || !st.Expired {
		t.Errorf("late overrun Settle = %+v, %v; want charged 450, expired", st, err)
	}
	if got, err := l.Expire(ctx, t0.Add(time.Hour)); err != nil || len(got) != 0 {
		t.Errorf("Expire after all settled = %v, %v; want none", got, err)
	}
	for _, s := range []budget.Scope{{}, {Team: "lab"}} {
		if b := balance(t, l, t0, s, budget.Day); b != (budget.Balance{Spent: 750}) {
			t.Errorf("%v at the end = %+v, want spent 750, nothing held", s, b)
		}
	}
}

// testExpireOnce sweeps with several instances at once: each expired
// reservation is returned exactly once and charged exactly once.
func testExpireOnce(t *testing.T, open Open) {
	ctx := context.Background()
	instance := open(t, nil)
	ls := []Store{instance(), instance(), instance()}
	const n = 60
	caps := budget.Caps{Team: dayCap(usd), Global: dayCap(usd)}
	var want budget.Nanos
	ids := map[string]bool{}
	for i := range n {
		team := []string{"lab", "ops"}[i%2]
		res, err := ls[i%3].Reserve(ctx, t0, req(team, "", budget.Nanos(1000+i), caps))
		if err != nil {
			t.Fatalf("Reserve %d: %v", i, err)
		}
		want += res.Amount
		ids[res.ID] = true
	}
	var (
		wg  sync.WaitGroup
		mu  sync.Mutex // guards got, errs
		got []budget.Reservation
		bad []error
	)
	start := make(chan struct{})
	for i := range 6 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			<-start
			r, err := ls[i%3].Expire(ctx, t0.Add(time.Minute))
			mu.Lock()
			defer mu.Unlock()
			got = append(got, r...)
			if err != nil {
				bad = append(bad, err)
			}
		}()
	}
	close(start)
	wg.Wait()
	if len(bad) > 0 {
		t.Fatalf("Expire errors: %v", bad)
	}
	seen := map[string]bool{}
	for _, r := range got {
		if seen[r.ID] || !ids[r.ID] {
			t.Errorf("reservation %s returned twice or unknown", r.ID)
		}
		seen[r.ID] = true
	}
	if len(seen) != n {
		t.Errorf("Expire returned %d reservations, want %d", len(seen), n)
	}
	g := balance(t, ls[0], t0, budget.Scope{}, budget.Day)
	lab := balance(t, ls[1], t0, budget.Scope{Team: "lab"}, budget.Day)
	ops := balance(t, ls[2], t0, budget.Scope{Team: "ops"}, budget.Day)
	if g != (budget.Balance{Spent: want}) || lab.Spent+ops.Spent != want || lab.Held+ops.Held != 0 {
		t.Errorf("after expiry global %+v, lab %+v, ops %+v; want all %d spent, nothing held", g, lab, ops, want)
	}
}

// testNoOverspend runs 64 clients on 3 ledger instances against a budget
// that runs out part-way: the sum charged never exceeds the binding cap and
// the ledger's sums equal the sum of the Settlement.Charged values exactly.
func testNoOverspend(t *testing.T, open Open, globalBinding bool) {
	const (
		clients  = 64
		attempts = 12
		limit    = 1 * usd // about half of what the clients would spend
	)
	ctx := context.Background()
	instance := open(t, nil)
	ls := []Store{instance(), instance(), instance()}
	teams := []string{"lab"}
	caps := budget.Caps{Team: dayCap(limit)}
	if globalBinding {
		teams = []string{"lab", "ops"}
		caps = budget.Caps{Team: dayCap(limit), Global: dayCap(limit)}
	}
	var (
		wg        sync.WaitGroup
		mu        sync.Mutex // guards the fields below
		charged   = map[string]budget.Nanos{}
		refusals  int
		successes int
		errs      []error
	)
	start := make(chan struct{})
	for c := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			rng := rand.New(rand.NewPCG(uint64(c), 42))
			l := ls[c%len(ls)]
			team := teams[c%len(teams)]
			<-start
			for range attempts {
				// A worst case between 0.1 and 0.9 cents; the bill is what
				// an upstream would charge, never above the worst case.
				worst := budget.Nanos(rng.Int64N(int64(8*usd/1000)) + int64(usd/1000))
				bill := budget.Nanos(rng.Int64N(int64(worst) + 1))
				res, err := l.Reserve(ctx, t0, req(team, fmt.Sprintf("k%d", c), worst, caps))
				mu.Lock()
				switch {
				case errors.Is(err, budget.ErrExhausted):
					refusals++
				case err != nil:
					errs = append(errs, err)
				default:
					successes++
				}
				mu.Unlock()
				if err != nil {
					continue
				}
				st, err := l.Settle(ctx, t0, res, bill)
				mu.Lock()
				if err != nil {
					errs = append(errs, err)
				} else {
					charged[team] += st.Charged
				}
				mu.Unlock()
			}
		}()
	}
	close(start)
	wg.Wait()
	if len(errs) > 0 {
		t.Fatalf("%d errors, first: %v", len(errs), errs[0])
	}
	if refusals == 0 || successes == 0 {
		t.Fatalf("%d successes, %d refusals: the budget must run out part-way", successes, refusals)
	}
	var total budget.Nanos
	for _, team := range teams {
		total += charged[team]
		b := balance(t, ls[0], t0, budget.Scope{Team: team}, budget.Day)
		if b != (budget.Balance{Spent: charged[team]}) {
			t.Errorf("team %s ledger = %+v, want spent %d (the sum charged), nothing held", team, b, charged[team])
		}
		if charged[team] > limit {
			t.Errorf("team %s charged %s USD, above its limit %s", team, charged[team], budget.Nanos(limit))
		}
	}
	if globalBinding {
		if g := balance(t, ls[1], t0, budget.Scope{}, budget.Day); g != (budget.Balance{Spent: total}) {
			t.Errorf("global ledger = %+v, want spent %d, nothing held", g, total)
		}
	}
	if total > limit {
		t.Errorf("charged %s USD in all, above the limit %s", total, budget.Nanos(limit))
	}
	t.Logf("%d reservations, %d refusals, %s USD charged of %s", successes, refusals, total, budget.Nanos(limit))
}

func testJournal(t *testing.T, open Open) {
	ctx := context.Background()
	instance := open(t, nil)
	a, b := instance(), instance()
	day1 := time.Date(2026, 3, 4, 23, 30, 0, 0, time.UTC)
	day2 := day1.Add(time.Hour)
	entries := []budget.Entry{
		{Time: day1.Add(-48 * time.Hour), Team: "lab", Model: "m1", Outcome: budget.Miss, Upstream: true, Cost: 999, InputTokens: 9},
		{Time: day1, Team: "lab", KeyID: "k1", Model: "m1", Run: "r1", Outcome: budget.Miss, Upstream: true, InputTokens: 10, OutputTokens: 5, Cost: 300},
		{Time: day1.Add(time.Minute), Team: "lab", KeyID: "k1", Model: "m1", Run: "r1", Outcome: budget.Hit, InputTokens: 10, OutputTokens: 5, Saved: 300},
		{Time: day2, Team: "ops", KeyID: "k2", Model: "m2", Outcome: budget.Bypass, Upstream: true, InputTokens: 7, OutputTokens: 3, Cost: 120},
		{Time: day2.Add(time.Second), Team: "ops", Model: "m2", Outcome: budget.Expired, Cost: 80},
	}
	for i, e := range entries {
		if err := []Store{a, b}[i%2].Append(ctx, e); err != nil {
			t.Fatalf("Append %d: %v", i, err)
		}
	}
	var scanned []budget.Entry
	if err := a.Scan(ctx, day1, "lab", func(e budget.Entry) error { scanned = append(scanned, e); return nil }); err != nil {
		t.Fatalf("Scan: %v", err)
	}
	if len(scanned) != 2 || !scanned[0].Time.Equal(entries[1].Time) || scanned[1].Outcome != budget.Hit ||
		scanned[0].Run != "r1" || scanned[0].KeyID != "k1" || scanned[0].Cost != 300 {
		t.Errorf("Scan(lab since day1) = %+v, want entries 1 and 2 in order", scanned)
	}
	stop := errors.New("stop")
	if err := a.Scan(ctx, day1, "", func(budget.Entry) error { return stop }); !errors.Is(err, stop) {
		t.Errorf("Scan with a failing fn: error = %v, want that error", err)
	}
	tests := []struct {
		by   budget.GroupBy
		want []budget.Row
	}{
		{budget.ByModel, []budget.Row{
			{Group: "m1", Requests: 2, UpstreamCalls: 1, CacheHits: 1, InputTokens: 20, OutputTokens: 10, Spent: 300, Saved: 300},
			{Group: "m2", Requests: 1, UpstreamCalls: 1, InputTokens: 7, OutputTokens: 3, Spent: 200},
		}},
		{budget.ByTeam, []budget.Row{
			{Group: "lab", Requests: 2, UpstreamCalls: 1, CacheHits: 1, InputTokens: 20, OutputTokens: 10, Spent: 300, Saved: 300},
			{Group: "ops", Requests: 1, UpstreamCalls: 1, InputTokens: 7, OutputTokens: 3, Spent: 200},
		}},
		{budget.ByRun, []budget.Row{
			{Group: "", Requests: 1, UpstreamCalls: 1, InputTokens: 7, OutputTokens: 3, Spent: 200},
			{Group: "r1", Requests: 2, UpstreamCalls: 1, CacheHits: 1, InputTokens: 20, OutputTokens: 10, Spent: 300, Saved: 300},
		}},
		{budget.ByDay, []budget.Row{
			{Group: "2026-03-04", Requests: 2, UpstreamCalls: 1, CacheHits: 1, InputTokens: 20, OutputTokens: 10, Spent: 300, Saved: 300},
			{Group: "2026-03-05", Requests: 1, UpstreamCalls: 1, InputTokens: 7, OutputTokens: 3, Spent: 200},
		}},
	}
	for _, tt := range tests {
		t.Run(string(tt.by), func(t *testing.T) {
			got, err := budget.Report(ctx, b, budget.Query{Since: day1, By: tt.by})
			if err != nil {
				t.Fatalf("Report: %v", err)
			}
			if fmt.Sprint(got) != fmt.Sprint(tt.want) {
				t.Errorf("Report by %s =\n%+v\nwant\n%+v", tt.by, got, tt.want)
			}
		})
	}
	got, err := budget.Report(ctx, a, budget.Query{Since: day1, Team: "ops", By: budget.ByTeam})
	if err != nil || len(got) != 1 || got[0].Group != "ops" || got[0].Spent != 200 {
		t.Errorf("Report for team ops = %+v, %v; want one ops row spending 200", got, err)
	}
}
