package budget

import (
	"context"
	"fmt"
	"sort"
	"strconv"
	"strings"
	"time"
)

// ParseSince reads how far back a report goes: a span ("30m", "12h", any
// Go duration, or days: "7d") before now, or a date ("2026-12-01", UTC).
func ParseSince(s string, now time.Time) (time.Time, error) {
	s = strings.TrimSpace(s)
	if d, err := time.Parse(time.DateOnly, s); err == nil {
		return d, nil
	}
	if days, ok := strings.CutSuffix(s, "d"); ok {
		n, err := strconv.ParseFloat(days, 64)
		if err == nil && n >= 0 && n <= 365*1000 {
			return now.Add(-time.Duration(n * 24 * float64(time.Hour))), nil
		}
	} else if d, err := time.ParseDuration(s); err == nil && d >= 0 {
		return now.Add(-d), nil
	}
	return time.Time{}, fmt.Errorf("%q: want a span like 30m, 12h or 7d, or a date like 2026-12-01", s)
}

// Statement is a spend report with its total and each capped team's
// standing: what `stint statement --json` prints and the admin endpoint
// returns. Amounts are exact decimal USD strings. They are estimates from
// configured prices and the upstream's usage; the provider's bill is the
// record.
type Statement struct {
	Since   time.Time      `json:"since"`
	By      GroupBy        `json:"by"`
	Rows    []StatementRow `json:"rows"`
	Total   StatementRow   `json:"total"`
	Budgets []Standing     `json:"budgets,omitempty"`
}

// StatementRow is a Row in printable form.
type StatementRow struct {
	Group         string  `json:"group"`
	Requests      int64   `json:"requests"`
	UpstreamCalls int64   `json:"upstream_calls"`
	CacheShare    float64 `json:"cache_share"`
	InputTokens   int64   `json:"input_tokens"`
	OutputTokens  int64   `json:"output_tokens"`
	SpentUSD      string  `json:"spent_usd"`
	SavedUSD      string  `json:"saved_usd"`
}

// Standing is one team's budget in its current period.
type Standing struct {
	Team     string `json:"team"`
	Period   Period `json:"period"`
	LimitUSD string `json:"limit_usd"`
	SpentUSD string `json:"spent_usd"`
	HeldUSD  string `json:"held_usd"`
	LeftUSD  string `json:"left_usd"`
	// Holds is how many of the team's reservations are not settled yet
	// (when the ledger reports it: a HoldReporter), and HeldUntil the
	// latest of their lease deadlines: by then each is settled by its
	// call, or charged in full.
	Holds     int        `json:"holds"`
	HeldUntil *time.Time `json:"held_until,omitempty"`
}

// Balancer reads a scope's balance; every Ledger is one.
type Balancer interface {
	Balance(ctx context.Context, now time.Time, scope Scope, p Period) (Balance, error)
}

// NewStatement reports the journal entries q selects, their total and,
// for each team in caps (only q.Team when it is set), the team's balance
// at now against its cap.
func NewStatement(ctx context.Context, j Journal, b Balancer, q Query, caps map[string]Cap, now time.Time) (Statement, error) {
	rows, err := Report(ctx, j, q)
	if err != nil {
		return Statement{}, err
	}
	st := Statement{Since: q.Since, By: q.By, Rows: make([]StatementRow, 0, len(rows))}
	total := Row{Group: "total"}
	for _, r := range rows {
		st.Rows = append(st.Rows, r.printable())
		total.Requests += r.Requests
		total.UpstreamCalls += r.UpstreamCalls
		total.CacheHits += r.CacheHits
		total.InputTokens += r.InputTokens
		total.OutputTokens += r.OutputTokens
		total.Spent += r.Spent
		total.Saved += r.Saved
	}
	st.Total = total.printable()
	teams := make([]string, 0, len(caps))
	for team := range caps {
		if q.Team == "" || team == q.Team {
			teams = append(teams, team)
		}
	}
	sort.Strings(teams)
	for _, team := range teams {
		c := caps[team]
		bal, err := b.Balance(ctx, now, Scope{Team: team}, c.Period)
		if err != nil {
			return Statement{}, err
		}
		s := Standing{
			Team: team, Period: c.Period, LimitUSD: c.Limit.String(), SpentUSD: bal.Spent.String(),
			HeldUSD: bal.Held.String(), LeftUSD: max(c.Limit-bal.Spent-bal.Held, 0).String(),
		}
		if hr, ok := b.(HoldReporter); ok {
			h, err := hr.TeamHolds(ctx, team)
			if err != nil {
				return Statement{}, err
			}
			s.Holds = h.Count
			if !h.Until.IsZero() {
				until := h.Until.UTC()
				s.HeldUntil = &until
			}
		}
		st.Budgets = append(st.Budgets, s)
	}
	return st, nil
}

func (r Row) printable() StatementRow {
	return StatementRow{
		Group: r.Group, Requests: r.Requests, UpstreamCalls: r.UpstreamCalls, CacheShare: r.CacheShare(),
		InputTokens: r.InputTokens, OutputTokens: r.OutputTokens, SpentUSD: r.Spent.String(), SavedUSD: r.Saved.String(),
	}
}
