package opsview

import (
	"cmp"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"slices"
	"strconv"
	"time"

	"github.com/stintlab/stint/budget"
)

// Snapshot is everything the page shows, taken at one moment. Amounts in
// USD are exact decimal strings as the spend statement gives them: they
// are estimates from configured prices and the upstream's usage counts;
// the provider's bill is the record.
type Snapshot struct {
	Taken time.Time `json:"taken"`
	// Window is the span the spend figures cover, as given (?since=), and
	// Since its start.
	Window string    `json:"window"`
	Since  time.Time `json:"since"`
	// Digest changes whenever anything the page shows changes (Taken
	// aside); the page's script polls it.
	Digest    string         `json:"digest"`
	Spend     SpendView      `json:"spend"`
	Cache     CacheView      `json:"cache"`
	Upstreams []UpstreamView `json:"upstreams"`
	Runs      RunsView       `json:"runs"`
	Search    SearchView     `json:"search"`
}

// SpendView is the spend statement of the window and each team's budget
// standing in its current period.
type SpendView struct {
	On       bool       `json:"on"`
	Error    string     `json:"error,omitempty"`
	Requests int64      `json:"requests"`
	Upstream int64      `json:"upstream_calls"`
	SpentUSD string     `json:"spent_usd"`
	SavedUSD string     `json:"saved_usd"`
	Teams    []TeamView `json:"teams"`
}

// TeamView is one team's line.
type TeamView struct {
	Team       string  `json:"team"`
	Requests   int64   `json:"requests"`
	Upstream   int64   `json:"upstream_calls"`
	CacheShare float64 `json:"cache_share"`
	SpentUSD   string  `json:"spent_usd"` // in the window
	SavedUSD   string  `json:"saved_usd"` // in the window
	// Budget is the team's standing this period; nil for a team without a
	// budget.
	Budget *BudgetView `json:"budget,omitempty"`
}

// BudgetView is a budget's standing: spent and held (reserved by calls in
// flight) against the limit.
type BudgetView struct {
	Period   string `json:"period"`
	LimitUSD string `json:"limit_usd"`
	SpentUSD string `json:"spent_usd"`
	HeldUSD  string `json:"held_usd"`
	LeftUSD  string `json:"left_usd"`
	// SpentShare and HeldShare are shares of the limit, for the bar; they
	// may pass 1 when a call cost more than was left.
	SpentShare float64 `json:"spent_share"`
	HeldShare  float64 `json:"held_share"`
}

// outcomeOrder lists the cache outcomes in the order the page shows them;
// the proxy's stint_requests_total names them in its cache label.
func outcomeOrder() []string { return []string{"hit", "shared", "partial", "miss", "bypass"} }

// CacheView counts generation requests by cache outcome since the proxy
// started (stint_requests_total).
type CacheView struct {
	On       bool          `json:"on"` // the metrics are readable
	Error    string        `json:"error,omitempty"`
	Requests int64         `json:"requests"`
	Outcomes []OutcomeView `json:"outcomes"`
	// Avoided is the share of requests answered without a call of their
	// own: hits and shared answers.
	Avoided float64 `json:"avoided_share"`
}

// OutcomeView is one cache outcome's count.
type OutcomeView struct {
	Outcome string  `json:"outcome"`
	Count   int64   `json:"count"`
	Share   float64 `json:"share"`
}

// UpstreamView is one upstream's calls, latency and breaker since the
// proxy started.
type UpstreamView struct {
	Name   string `json:"name"`
	Calls  int64  `json:"calls"`  // stint_upstream_calls_total
	Failed int64  `json:"failed"` // of them, not answered 2xx
	// Timed is the number of latencies in stint_upstream_seconds; the
	// seconds are nil without any. P50 and P95 are estimated from the
	// histogram's buckets (linear within a bucket).
	Timed       uint64   `json:"timed"`
	MeanSeconds *float64 `json:"mean_seconds"`
	P50Seconds  *float64 `json:"p50_seconds"`
	P95Seconds  *float64 `json:"p95_seconds"`
	// Breaker is "closed", "half-open", "open", or "none" when the proxy
	// exports no breaker state for this upstream; Trips counts its trips
	// (nil when not exported).
	Breaker string `json:"breaker"`
	Trips   *int64 `json:"trips"`
}

// RunsView lists the most recently active recorded runs of every team.
type RunsView struct {
	On    bool      `json:"on"`
	Error string    `json:"error,omitempty"`
	Runs  []RunLine `json:"runs"`
	Total int       `json:"total"` // runs recorded, shown or not
}

// RunLine is one run.
type RunLine struct {
	Team       string    `json:"team"`
	Run        string    `json:"run"`
	Last       time.Time `json:"last"`
	Calls      int64     `json:"calls"`
	Upstream   int64     `json:"upstream_calls"`
	CacheShare float64   `json:"cache_share"` // share of calls that did not reach the upstream
	SpentUSD   string    `json:"spent_usd"`
	SavedUSD   string    `json:"saved_usd"`
}

// SearchView is what the search sidecar reports.
type SearchView struct {
	// Sidecar is its address as configured, without any user info; empty
	// when none is configured.
	Sidecar   string       `json:"sidecar"`
	Reachable bool         `json:"reachable"`
	Error     string       `json:"error,omitempty"`
	Searches  []SearchLine `json:"searches"`
	Total     int          `json:"total"` // jobs the sidecar has, shown or not
}

// SearchLine is one search job and its learning curve.
type SearchLine struct {
	ID         string  `json:"id"`
	Task       string  `json:"task"` // the task file's name
	Run        string  `json:"run"`
	State      string  `json:"state"`
	Step       int     `json:"step"`
	Steps      int     `json:"steps"`
	BestPrompt string  `json:"best_prompt"`
	TrainAcc   float64 `json:"train_accuracy"`
	DevAcc     float64 `json:"dev_accuracy"` // -1 before the first evaluation
	Calls      int     `json:"scoring_calls"`
	CacheShare float64 `json:"cache_share"`
	SpentUSD   float64 `json:"spent_usd"`
	Error      string  `json:"error,omitempty"`
	// Runner is the sidecar running the search (or that ran it last) when
	// sidecars share one queue, and Attempts how many times a sidecar took
	// it; "" and 0 on a single sidecar.
	Runner   string `json:"runner,omitempty"`
	Attempts int    `json:"attempts,omitempty"`
	// Curve is the per-step history; CurveError says why it is missing.
	Curve      []CurvePoint `json:"curve"`
	CurveError string       `json:"curve_error,omitempty"`
}

// CurvePoint is one step of a search.
type CurvePoint struct {
	Step       int     `json:"step"`
	MeanReward float64 `json:"mean_reward"`
	TrainAcc   float64 `json:"train_accuracy"`
	DevAcc     float64 `json:"dev_accuracy"` // -1 when not evaluated at this step
}

// Take gathers a snapshot at now; the spend figures cover since onwards,
// window names that span for people.
func (v *View) Take(ctx context.Context, now, since time.Time, window string) Snapshot {
	s := Snapshot{Taken: now.UTC(), Window: window, Since: since.UTC()}
	s.Spend = v.spend(ctx, since)
	s.Cache, s.Upstreams = v.fromMetrics()
	s.Runs = v.runs(ctx)
	s.Search = v.searches(ctx)
	s.Digest = digest(s)
	return s
}

// digest hashes what the page shows, the time it was taken aside.
func digest(s Snapshot) string {
	s.Taken, s.Since, s.Digest = time.Time{}, time.Time{}, ""
	b, _ := json.Marshal(s)
	sum := sha256.Sum256(b)
	return hex.EncodeToString(sum[:8])
}

func (v *View) spend(ctx context.Context, since time.Time) SpendView {
	if v.o.Spend == nil {
		return SpendView{Teams: v.bareTeams()}
	}
	st, err := v.o.Spend.Statement(ctx, budget.Query{Since: since, By: budget.ByTeam})
	if err != nil {
		return SpendView{On: true, Error: "spend statement: " + err.Error(), Teams: v.bareTeams()}
	}
	out := SpendView{On: true, Requests: st.Total.Requests, Upstream: st.Total.UpstreamCalls,
		SpentUSD: st.Total.SpentUSD, SavedUSD: st.Total.SavedUSD}
	rows := map[string]budget.StatementRow{}
	for _, r := range st.Rows {
		rows[r.Group] = r
	}
	standing := map[string]budget.Standing{}
	for _, b := range st.Budgets {
		standing[b.Team] = b
	}
	for _, name := range v.teamNames(rows, standing) {
		r, ok := rows[name]
		if !ok {
			r = budget.StatementRow{SpentUSD: "0.00", SavedUSD: "0.00"}
		}
		tv := TeamView{Team: name, Requests: r.Requests, Upstream: r.UpstreamCalls, CacheShare: r.CacheShare,
			SpentUSD: r.SpentUSD, SavedUSD: r.SavedUSD}
		if b, ok := standing[name]; ok {
			tv.Budget = &BudgetView{Period: string(b.Period), LimitUSD: b.LimitUSD, SpentUSD: b.SpentUSD,
				HeldUSD: b.HeldUSD, LeftUSD: b.LeftUSD,
				SpentShare: shareOf(b.SpentUSD, b.LimitUSD), HeldShare: shareOf(b.HeldUSD, b.LimitUSD)}
		}
		out.Teams = append(out.Teams, tv)
	}
	return out
}

// bareTeams lists the configured teams without figures.
func (v *View) bareTeams() []TeamView {
	out := make([]TeamView, 0, len(v.o.Teams))
	for _, t := range v.o.Teams {
		out = append(out, TeamView{Team: t, SpentUSD: "0.00", SavedUSD: "0.00"})
	}
	return out
}

// teamNames orders the teams: configured ones first, in config order, then
// any other the statement names.
func (v *View) teamNames(rows map[string]budget.StatementRow, standing map[string]budget.Standing) []string {
	seen := map[string]bool{}
	var names, extra []string
	for _, t := range v.o.Teams {
		if !seen[t] {
			seen[t] = true
			names = append(names, t)
		}
	}
	for t := range rows {
		if !seen[t] {
			seen[t] = true
			extra = append(extra, t)
		}
	}
	for t := range standing {
		if !seen[t] {
			seen[t] = true
			extra = append(extra, t)
		}
	}
	slices.Sort(extra)
	return append(names, extra...)
}

// shareOf is part/whole for two decimal USD strings; 0 when whole is 0.
func shareOf(part, whole string) float64 {
	p, err1 := strconv.ParseFloat(part, 64)
	w, err2 := strconv.ParseFloat(whole, 64)
	if err1 != nil || err2 != nil || w <= 0 {
		return 0
	}
	return p / w
}

func (v *View) runs(ctx context.Context) RunsView {
	if v.o.Runs == nil {
		return RunsView{}
	}
	out := RunsView{On: true}
	var all []RunLine
	for _, team := range v.o.Teams {
		list, err := v.o.Runs.List(ctx, team)
		if err != nil {
			out.Error = "run journal: " + err.Error()
			break
		}
		for _, s := range list {
			l := RunLine{Team: s.Team, Run: s.Run, Last: s.Last.UTC(), Calls: s.Calls, Upstream: s.Upstream,
				SpentUSD: budget.Nanos(s.CostNanos).String(), SavedUSD: budget.Nanos(s.SavedNanos).String()}
			if l.Team == "" {
				l.Team = team
			}
			if s.Calls > 0 {
				l.CacheShare = float64(s.Calls-s.Upstream) / float64(s.Calls)
			}
			all = append(all, l)
		}
	}
	slices.SortFunc(all, func(a, b RunLine) int {
		if c := b.Last.Compare(a.Last); c != 0 {
			return c
		}
		return cmp.Or(cmp.Compare(a.Team, b.Team), cmp.Compare(a.Run, b.Run))
	})
	out.Total = len(all)
	out.Runs = all[:min(len(all), v.o.MaxRuns)]
	return out
}
