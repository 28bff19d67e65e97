package boltledger_test

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"time"

	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
)

// Example walks one call through the budget: price it, reserve the worst
// case, settle the real usage, journal it. The scenario (a glossary team
// tuning prompts against "demo-model") is invented.
func Example() {
	dir, _ := os.MkdirTemp("", "stint-example")
	defer os.RemoveAll(dir)
	db, _ := bbolt.Open(filepath.Join(dir, "stint.db"), 0o600, nil)
	defer db.Close()
	ledger, _ := boltledger.New(db, boltledger.Options{})

	prices := budget.PriceTable{Models: map[string]budget.Price{"demo-model": {Input: 0.50, Output: 1.50}}}
	rate, _ := prices.Rate("demo-model")
	limit, _ := budget.FromUSD(0.01)
	caps := budget.Caps{Team: &budget.Cap{Limit: limit, Period: budget.Month}}
	now := time.Date(2026, 12, 1, 9, 0, 0, 0, time.UTC)
	ctx := context.Background()

	// Worst case: 1200 prompt tokens, max_tokens 256, n 4.
	worst, _ := rate.Cost(budget.Usage{InputTokens: 1200, OutputTokens: 256 * 4})
	res, err := ledger.Reserve(ctx, now, budget.Request{Team: "glossary", Key: "sha256:ab12", Amount: worst, Caps: caps, Lease: 5 * time.Minute})
	fmt.Println("reserved", res.Amount, "USD, left", res.Remaining, err)

	actual, _ := rate.Cost(budget.Usage{InputTokens: 1200, OutputTokens: 310})
	st, _ := ledger.Settle(ctx, now.Add(2*time.Second), res, actual)
	fmt.Println("charged", st.Charged, "released", st.Released, "left", st.Remaining)
	_ = ledger.Append(ctx, budget.Entry{Time: now, Team: "glossary", KeyID: "sha256:ab12", Model: "demo-model",
		InputTokens: 1200, OutputTokens: 310, Cost: st.Charged, Outcome: budget.Miss, Upstream: true})

	// A request that cannot fit is refused before any upstream call.
	_, err = ledger.Reserve(ctx, now, budget.Request{Team: "glossary", Amount: limit, Caps: caps, Lease: time.Minute})
	var ex *budget.ExhaustedError
	fmt.Println(errors.As(err, &ex), ex.Remaining)

	rows, _ := budget.Report(ctx, ledger, budget.Query{Since: now.Add(-time.Hour), By: budget.ByModel})
	fmt.Printf("%s: %d requests, %s USD\n", rows[0].Group, rows[0].Requests, rows[0].Spent)
	// Output:
	// reserved 0.002136 USD, left 0.007864 <nil>
	// charged 0.001065 released 0.001071 left 0.008935
	// true 0.008935
	// demo-model: 1 requests, 0.001065 USD
}
