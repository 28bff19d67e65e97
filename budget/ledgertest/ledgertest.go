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

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

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
		require.NoError(t, err, "Reserve under %+v", caps)
		_, err = l.Settle(ctx, t0, res, 60)
		require.NoError(t, err, "Settle")
	}
	held, err := l.Reserve(ctx, t0, req("lab", "k1", 25, budget.Caps{}))
	require.NoError(t, err, "Reserve")
	for _, p := range budget.Periods {
		for _, s := range []budget.Scope{{Team: "lab", Key: "k1"}, {Team: "lab"}} {
			assert.Equal(t, budget.Balance{Spent: 180, Held: 25}, balance(t, l, t0, s, p), "%v this %s", s, p)
		}
		assert.Equal(t, budget.Nanos(180), balance(t, l, t0, budget.Scope{}, p).Spent, "global spend this %s", p)
	}
	_, err = l.Settle(ctx, t0, held, 0)
	require.NoError(t, err, "Settle")
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
				require.NoError(t, err, "Reserve")
				_, err = l.Settle(ctx, t0, res, 350)
				require.NoError(t, err, "Settle")
			}
			want := budget.Nanos(650) // 1000 - 350
			if tt.scope.Team == "" {
				want = 300 // 1000 - 2×350
			}
			_, err := l.Reserve(ctx, t0.Add(time.Hour), req("lab", "k1", want+1, tt.caps))
			var ex *budget.ExhaustedError
			require.ErrorAs(t, err, &ex, "Reserve of %d under a new %s cap", want+1, tt.name)
			require.Equal(t, tt.scope, ex.Scope, "the refusing cap's scope")
			require.Equal(t, want, ex.Remaining, "what the new %s cap leaves", tt.name)
			res, err := l.Reserve(ctx, t0.Add(time.Hour), req("lab", "k1", want, tt.caps))
			require.NoError(t, err, "Reserve of exactly what is left")
			assert.Zero(t, res.Remaining, "Remaining")
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
	require.NoError(t, err, "Balance(%v, %s)", s, p)
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
			require.NoError(t, err, "Reserve")
			assert.NotEmpty(t, res.ID, "Reserve: an id")
			assert.Equal(t, tt.amount, res.Amount, "Reserve: amount")
			assert.Equal(t, "lab", res.Team, "Reserve: team")
			assert.Equal(t, "k1", res.Key, "Reserve: key")
			assert.True(t, res.Deadline.Equal(t0.Add(time.Minute)), "Deadline = %v, want %v", res.Deadline, t0.Add(time.Minute))
			assert.Equal(t, 500-tt.amount, res.Remaining, "Reservation.Remaining (key cap is tighter)")
			for _, s := range []budget.Scope{{Team: "lab"}, {Team: "lab", Key: "k1"}} {
				assert.Equal(t, budget.Balance{Held: tt.amount}, balance(t, l, t0, s, budget.Day), "%v after Reserve", s)
			}
			st, err := l.Settle(ctx, t0.Add(time.Second), res, tt.actual)
			require.NoError(t, err, "Settle")
			want := budget.Settlement{Charged: tt.wantCharged, Released: tt.wantReleased, Remaining: max(500-tt.wantCharged, 0)}
			assert.Equal(t, want, st, "Settle")
			for _, s := range []budget.Scope{{Team: "lab"}, {Team: "lab", Key: "k1"}} {
				assert.Equal(t, budget.Balance{Spent: tt.wantCharged}, balance(t, l, t0, s, budget.Day), "%v after Settle", s)
			}
		})
	}
	t.Run("uncapped", func(t *testing.T) {
		l := open(t, nil)()
		res, err := l.Reserve(context.Background(), t0, req("lab", "", 7, budget.Caps{}))
		require.NoError(t, err, "Reserve")
		assert.Equal(t, budget.Nanos(-1), res.Remaining, "Remaining without caps")
		st, err := l.Settle(context.Background(), t0, res, 5)
		require.NoError(t, err, "Settle")
		assert.Equal(t, budget.Nanos(5), st.Charged, "Settle: charged")
		assert.Equal(t, budget.Nanos(-1), st.Remaining, "Settle: remaining without caps")
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
			require.NoError(t, err, "first Reserve")
			_, err = l.Settle(ctx, t0, first, 600)
			require.NoError(t, err, "Settle")
			_, err = l.Reserve(ctx, t0, req("lab", "k1", 500, tt.caps))
			var ex *budget.ExhaustedError
			require.ErrorAs(t, err, &ex, "second Reserve")
			require.ErrorIs(t, err, budget.ErrExhausted, "second Reserve")
			want := budget.ExhaustedError{Scope: tt.wantScope, Period: budget.Day, Limit: tt.wantLimit, Remaining: tt.wantLeft, Requested: 500}
			assert.Equal(t, want, *ex, "ExhaustedError")
			scopes := []budget.Scope{{Team: "lab"}}
			if tt.caps.Key != nil {
				scopes = append(scopes, budget.Scope{Team: "lab", Key: "k1"})
			}
			if tt.caps.Global != nil {
				scopes = append(scopes, budget.Scope{})
			}
			for _, s := range scopes {
				assert.Equal(t, budget.Balance{Spent: 600}, balance(t, l, t0, s, budget.Day), "%v after refusal", s)
			}
			// What is left still fits.
			_, err = l.Reserve(ctx, t0, req("lab", "k1", tt.wantLeft, tt.caps))
			assert.NoError(t, err, "Reserve of the remaining %d", tt.wantLeft)
		})
	}
}

func testNotHeld(t *testing.T, open Open) {
	ctx := context.Background()
	l := open(t, nil)()
	res, err := l.Reserve(ctx, t0, req("lab", "", 100, budget.Caps{Team: dayCap(1000), Global: dayCap(1000)}))
	require.NoError(t, err, "Reserve")
	_, err = l.Settle(ctx, t0, res, 10)
	require.NoError(t, err, "Settle")
	_, err = l.Settle(ctx, t0, res, 10)
	assert.ErrorIs(t, err, budget.ErrNotHeld, "second Settle")
	bogus := res
	bogus.ID = "no-such-reservation"
	_, err = l.Settle(ctx, t0, bogus, 10)
	assert.ErrorIs(t, err, budget.ErrNotHeld, "Settle of an unknown id")
	for _, s := range []budget.Scope{{}, {Team: "lab"}} {
		assert.Equal(t, budget.Balance{Spent: 10}, balance(t, l, t0, s, budget.Day), "%v: the charge counts once", s)
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
			_, err := l.Reserve(ctx, t0, r)
			assert.ErrorIs(t, err, budget.ErrInvalid, "Reserve(%+v)", r)
		})
	}
	res, err := l.Reserve(ctx, t0, good)
	require.NoError(t, err, "Reserve(good)")
	_, err = l.Settle(ctx, t0, res, -1)
	assert.ErrorIs(t, err, budget.ErrInvalid, "Settle(-1)")
	_, err = l.Balance(ctx, t0, budget.Scope{Key: "k1"}, budget.Day)
	assert.ErrorIs(t, err, budget.ErrInvalid, "Balance of a key without team")
	_, err = l.Balance(ctx, t0, budget.Scope{Team: "lab"}, "year")
	assert.ErrorIs(t, err, budget.ErrInvalid, "Balance with period year")
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
			require.NoError(t, err, "Reserve before the boundary")
			// Settled after the boundary, the charge still belongs to the
			// period the reservation was made in.
			_, err = l.Settle(ctx, tt.after, res, 70)
			require.NoError(t, err, "Settle")
			assert.Equal(t, budget.Nanos(70), balance(t, l, tt.before, team, tt.period).Spent, "old period spent")
			assert.Equal(t, budget.Balance{}, balance(t, l, tt.after, team, tt.period), "new period")
			// The whole limit is available again after the boundary.
			res2, err := l.Reserve(ctx, tt.after, req("lab", "", 100, caps))
			require.NoError(t, err, "Reserve of the full limit after the boundary")
			_, err = l.Settle(ctx, tt.after, res2, 100)
			require.NoError(t, err, "Settle")
			_, err = l.Reserve(ctx, tt.sameSpan, req("lab", "", 1, caps))
			assert.ErrorIs(t, err, budget.ErrExhausted, "Reserve later in the same %s", tt.period)
			// Every charge counts in every period, capped or not.
			assert.Equal(t, budget.Balance{Spent: 170}, balance(t, l, tt.before, team, budget.Total), "total sum")
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
		require.NoError(t, err, "Reserve")
		held = append(held, res)
	}
	none, err := l.Expire(ctx, t0.Add(999*time.Millisecond))
	require.NoError(t, err, "Expire before any deadline")
	require.Empty(t, none, "Expire before any deadline")
	got, err := l.Expire(ctx, t0.Add(time.Second)) // exactly the first deadline
	require.NoError(t, err, "Expire")
	require.Len(t, got, 1, "Expire at the first deadline")
	require.Equal(t, held[0].ID, got[0].ID, "Expire at the first deadline")
	require.Equal(t, budget.Nanos(100), got[0].Amount, "Expire at the first deadline")
	for _, s := range []budget.Scope{{}, {Team: "lab"}} {
		assert.Equal(t, budget.Balance{Spent: 100, Held: 500}, balance(t, l, t0, s, budget.Day), "%v after first expiry", s)
	}
	// The expired holder comes back: it is not refunded.
	_, err = l.Settle(ctx, t0.Add(time.Second), held[0], 1)
	assert.ErrorIs(t, err, budget.ErrNotHeld, "Settle after expiry")
	// Settling past the deadline before any sweep charges at least the
	// reserved amount.
	st, err := l.Settle(ctx, t0.Add(2*time.Second), held[1], 50)
	require.NoError(t, err, "late Settle")
	assert.Equal(t, budget.Settlement{Charged: 200, Expired: true, Remaining: 10*usd - 300 - 300}, st, "late Settle")
	// A late overrun is charged in full.
	st, err = l.Settle(ctx, t0.Add(time.Hour), held[2], 450)
	require.NoError(t, err, "late overrun Settle")
	assert.Equal(t, budget.Nanos(450), st.Charged, "late overrun Settle: charged")
	assert.True(t, st.Expired, "late overrun Settle: expired")
	none, err = l.Expire(ctx, t0.Add(time.Hour))
	assert.NoError(t, err, "Expire after all settled")
	assert.Empty(t, none, "Expire after all settled")
	for _, s := range []budget.Scope{{}, {Team: "lab"}} {
		assert.Equal(t, budget.Balance{Spent: 750}, balance(t, l, t0, s, budget.Day), "%v at the end: nothing held", s)
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
		require.NoError(t, err, "Reserve %d", i)
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
	require.Empty(t, bad, "Expire errors")
	seen := map[string]bool{}
	for _, r := range got {
		assert.False(t, seen[r.ID], "reservation %s returned twice", r.ID)
		assert.True(t, ids[r.ID], "reservation %s unknown", r.ID)
		seen[r.ID] = true
	}
	assert.Len(t, seen, n, "reservations Expire returned")
	g := balance(t, ls[0], t0, budget.Scope{}, budget.Day)
	lab := balance(t, ls[1], t0, budget.Scope{Team: "lab"}, budget.Day)
	ops := balance(t, ls[2], t0, budget.Scope{Team: "ops"}, budget.Day)
	assert.Equal(t, budget.Balance{Spent: want}, g, "global after expiry")
	assert.Equal(t, want, lab.Spent+ops.Spent, "teams' spend after expiry (lab %+v, ops %+v)", lab, ops)
	assert.Zero(t, lab.Held+ops.Held, "held after expiry")
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
	require.Empty(t, errs, "errors")
	require.True(t, refusals > 0 && successes > 0, "%d successes, %d refusals: the budget must run out part-way", successes, refusals)
	var total budget.Nanos
	for _, team := range teams {
		total += charged[team]
		b := balance(t, ls[0], t0, budget.Scope{Team: team}, budget.Day)
		assert.Equal(t, budget.Balance{Spent: charged[team]}, b, "team %s ledger: the sum charged, nothing held", team)
		assert.LessOrEqual(t, charged[team], budget.Nanos(limit), "team %s charged above its limit", team)
	}
	if globalBinding {
		assert.Equal(t, budget.Balance{Spent: total}, balance(t, ls[1], t0, budget.Scope{}, budget.Day), "global ledger: spent in all, nothing held")
	}
	assert.LessOrEqual(t, total, budget.Nanos(limit), "charged in all above the limit")
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
		require.NoError(t, []Store{a, b}[i%2].Append(ctx, e), "Append %d", i)
	}
	var scanned []budget.Entry
	require.NoError(t, a.Scan(ctx, day1, "lab", func(e budget.Entry) error { scanned = append(scanned, e); return nil }), "Scan")
	ok := len(scanned) == 2 && scanned[0].Time.Equal(entries[1].Time) && scanned[1].Outcome == budget.Hit &&
		scanned[0].Run == "r1" && scanned[0].KeyID == "k1" && scanned[0].Cost == 300
	assert.True(t, ok, "Scan(lab since day1) = %+v, want entries 1 and 2 in order", scanned)
	stop := errors.New("stop")
	assert.ErrorIs(t, a.Scan(ctx, day1, "", func(budget.Entry) error { return stop }), stop, "Scan with a failing fn")
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
			require.NoError(t, err, "Report")
			assert.Equal(t, fmt.Sprint(tt.want), fmt.Sprint(got), "Report by %s", tt.by)
		})
	}
	got, err := budget.Report(ctx, a, budget.Query{Since: day1, Team: "ops", By: budget.ByTeam})
	require.NoError(t, err, "Report for team ops")
	require.Len(t, got, 1, "Report for team ops")
	assert.Equal(t, "ops", got[0].Group, "Report for team ops")
	assert.Equal(t, budget.Nanos(200), got[0].Spent, "Report for team ops")
}
