package budget

import (
	"context"
	"fmt"
	"sort"
	"time"
)

// Outcome says how a request was served, for the spend journal.
type Outcome string

// The outcomes a journal entry records.
const (
	// Hit: served from the cache; nothing was charged and Saved says what
	// the call would have cost.
	Hit Outcome = "hit"
	// Miss: not in the cache; the upstream was called and charged.
	Miss Outcome = "miss"
	// Bypass: the cache was not consulted (non-deterministic request or
	// no-cache); the upstream was called and charged.
	Bypass Outcome = "bypass"
	// Expired: a reservation whose holder vanished, charged in full by
	// Ledger.Expire. No answer was recorded, and the upstream may have
	// been called.
	Expired Outcome = "expired"
)

// Entry is one line of the spend journal: a charge, a saving or both.
type Entry struct {
	Time         time.Time // when the answer was given
	Team         string    // the team charged or served
	KeyID        string    // the calling key's id, never the key itself
	Model        string    // as requested
	Run          string    // the Stint-Run id, if any
	InputTokens  int64     // prompt tokens (from usage, or counted for a hit)
	OutputTokens int64     // generated tokens
	Cost         Nanos     // what was charged to the ledger (Settlement.Charged)
	Saved        Nanos     // what a cache hit would have cost now
	Outcome      Outcome   // how the request was served
	Upstream     bool      // whether an upstream call was made
}

// Journal is the append-only spend journal. Implementations store entries
// durably (Append returns after the store has them) and are safe for
// concurrent use.
type Journal interface {
	// Append adds e to the journal.
	Append(ctx context.Context, e Entry) error
	// Scan calls fn for every entry with Time not before since, of team
	// (every team if team is empty), in time order within a team. If fn
	// returns an error, Scan stops and returns it.
	Scan(ctx context.Context, since time.Time, team string, fn func(Entry) error) error
}

// GroupBy picks the column a spend report is grouped by.
type GroupBy string

// The groupings a report supports.
const (
	ByModel GroupBy = "model"
	ByTeam  GroupBy = "team"
	ByRun   GroupBy = "run"
	ByDay   GroupBy = "day"
)

// Query selects and groups journal entries for Report.
type Query struct {
	Since    time.Time      // entries from this time on
	Team     string         // only this team; empty means all
	By       GroupBy        // grouping column
	Location *time.Location // time zone of ByDay days; nil means UTC
}

// Row is one line of a spend report.
type Row struct {
	// Group is the model, team, run id (empty for calls without one) or
	// day ("2026-12-01") the row sums up.
	Group         string
	Requests      int64 // journal entries other than Expired ones
	UpstreamCalls int64 // entries with Upstream set
	CacheHits     int64 // entries with Outcome Hit
	InputTokens   int64 // sum of InputTokens
	OutputTokens  int64 // sum of OutputTokens
	Spent         Nanos // sum of Cost, expired reservations included
	Saved         Nanos // sum of Saved
}

// CacheShare returns the fraction of requests served from the cache, or 0
// for a row without requests.
func (r Row) CacheShare() float64 {
	if r.Requests == 0 {
		return 0
	}
	return float64(r.CacheHits) / float64(r.Requests)
}

// Report reads the journal entries q selects and sums them per group,
// returning rows sorted by Group. The CLI prints them as a table.
func Report(ctx context.Context, j Journal, q Query) ([]Row, error) {
	switch q.By {
	case ByModel, ByTeam, ByRun, ByDay:
	default:
		return nil, fmt.Errorf("budget: report grouping %q: want model, team, run or day", string(q.By))
	}
	loc := q.Location
	if loc == nil {
		loc = time.UTC
	}
	rows := map[string]*Row{}
	err := j.Scan(ctx, q.Since, q.Team, func(e Entry) error {
		var g string
		switch q.By {
		case ByModel:
			g = e.Model
		case ByTeam:
			g = e.Team
		case ByRun:
			g = e.Run
		case ByDay:
			g = e.Time.In(loc).Format("2006-01-02")
		}
		r := rows[g]
		if r == nil {
			r = &Row{Group: g}
			rows[g] = r
		}
		if e.Outcome != Expired {
			r.Requests++
		}
		if e.Upstream {
			r.UpstreamCalls++
		}
		if e.Outcome == Hit {
			r.CacheHits++
		}
		r.InputTokens += e.InputTokens
		r.OutputTokens += e.OutputTokens
		r.Spent += e.Cost
		r.Saved += e.Saved
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("budget: report: %w", err)
	}
	out := make([]Row, 0, len(rows))
	for _, r := range rows {
		out = append(out, *r)
	}
	sort.Slice(out, func(a, b int) bool { return out[a].Group < out[b].Group })
	return out, nil
}
