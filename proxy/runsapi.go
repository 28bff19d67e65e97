package proxy

import (
	"cmp"
	"errors"
	"fmt"
	"net/http"
	"slices"
	"strconv"
	"time"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/cache/runs"
)

// RunsPrefix starts the path of the run endpoints. They take a team key
// and show only that team's runs.
const RunsPrefix = "/stint/runs"

// RunView is a run's summary as the run endpoints return it.
type RunView struct {
	Run           string    `json:"run"`
	First         time.Time `json:"first"`
	Last          time.Time `json:"last"`
	Calls         int64     `json:"calls"`
	UpstreamCalls int64     `json:"upstream_calls"`
	CacheShare    float64   `json:"cache_share"` // share of calls that did not reach the upstream
	SpentUSD      string    `json:"spent_usd"`
	SavedUSD      string    `json:"saved_usd"`
	Keys          int64     `json:"distinct_requests"`
	Bodies        int64     `json:"distinct_answers"`
	Bytes         int64     `json:"bytes"`
}

// ViewOf turns a journal summary into a RunView.
func ViewOf(s runs.Summary) RunView {
	v := RunView{
		Run: s.Run, First: s.First, Last: s.Last, Calls: s.Calls, UpstreamCalls: s.Upstream,
		SpentUSD: budget.Nanos(s.CostNanos).String(), SavedUSD: budget.Nanos(s.SavedNanos).String(),
		Keys: s.Keys, Bodies: s.Bodies, Bytes: s.Bytes,
	}
	if s.Calls > 0 {
		v.CacheShare = float64(s.Calls-s.Upstream) / float64(s.Calls)
	}
	return v
}

// RunDetail is one run as GET /stint/runs/{id} returns it: its summary,
// its calls by model and by cache outcome, and the replays of it this
// proxy process has served.
type RunDetail struct {
	RunView
	ByModel   []RunGroup `json:"by_model"`
	ByOutcome []RunGroup `json:"by_outcome"` // hit, miss, shared, partial, bypass
	// Replays are the replay sessions (Stint-Replay-Session; "" for calls
	// that named none) this process has answered since it started, with
	// the calls each got.
	Replays []ReplaySession `json:"replay_sessions"`
}

// RunGroup is a run's calls of one model or one cache outcome.
type RunGroup struct {
	Name          string `json:"name"`
	Calls         int64  `json:"calls"`
	UpstreamCalls int64  `json:"upstream_calls"`
	SpentUSD      string `json:"spent_usd"`
	SavedUSD      string `json:"saved_usd"`
}

// ReplaySession is one replay session of a run and the calls it was
// answered.
type ReplaySession struct {
	Session string `json:"session"`
	Calls   int64  `json:"calls"`
}

// detailOf reads a run's entries into its detail.
func (p *Proxy) detailOf(r *http.Request, team *Team, s runs.Summary) (RunDetail, error) {
	type sums struct{ calls, upstream, cost, saved int64 }
	byModel, byOutcome := map[string]*sums{}, map[string]*sums{}
	add := func(m map[string]*sums, name string, e runs.Entry) {
		g := m[name]
		if g == nil {
			g = &sums{}
			m[name] = g
		}
		g.calls++
		g.cost += e.CostNanos
		g.saved += e.SavedNanos
		if e.Upstream {
			g.upstream++
		}
	}
	err := p.runs.Entries(r.Context(), team.Name, s.Run, func(e runs.Entry) error {
		add(byModel, cmp.Or(e.Model, "(none)"), e)
		add(byOutcome, cmp.Or(e.Outcome, "error"), e)
		return nil
	})
	if err != nil {
		return RunDetail{}, err
	}
	groups := func(m map[string]*sums) []RunGroup {
		out := make([]RunGroup, 0, len(m))
		for name, g := range m {
			out = append(out, RunGroup{Name: name, Calls: g.calls, UpstreamCalls: g.upstream,
				SpentUSD: budget.Nanos(g.cost).String(), SavedUSD: budget.Nanos(g.saved).String()})
		}
		slices.SortFunc(out, func(a, b RunGroup) int { return cmp.Or(cmp.Compare(b.Calls, a.Calls), cmp.Compare(a.Name, b.Name)) })
		return out
	}
	d := RunDetail{RunView: ViewOf(s), ByModel: groups(byModel), ByOutcome: groups(byOutcome), Replays: []ReplaySession{}}
	for session, n := range p.cursor.Sessions(team.Name, s.Run) {
		d.Replays = append(d.Replays, ReplaySession{Session: session, Calls: n})
	}
	slices.SortFunc(d.Replays, func(a, b ReplaySession) int { return cmp.Compare(a.Session, b.Session) })
	return d, nil
}

// RunList is the body of GET /stint/runs.
type RunList struct {
	Runs []RunView `json:"runs"`
	// StoredBytes is what the team's runs hold against its quota,
	// QuotaBytes (0: none).
	StoredBytes int64 `json:"stored_bytes"`
	QuotaBytes  int64 `json:"quota_bytes"`
}

func (p *Proxy) routeRuns(mux *http.ServeMux) {
	mux.HandleFunc("GET "+RunsPrefix, p.runsEndpoint(p.serveRunList))
	mux.HandleFunc("GET "+RunsPrefix+"/{id}", p.runsEndpoint(p.serveRunShow))
	mux.HandleFunc("GET "+RunsPrefix+"/{id}/archive", p.runsEndpoint(p.serveRunExport))
	mux.HandleFunc("POST "+RunsPrefix+"/import", p.runsEndpoint(p.serveRunImport))
	mux.HandleFunc("DELETE "+RunsPrefix+"/{id}", p.runsEndpoint(p.serveRunDelete))
}

// runsEndpoint authenticates the team and checks the journal is on.
func (p *Proxy) runsEndpoint(h func(http.ResponseWriter, *http.Request, *Team)) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		team, _, release, aerr := p.enter(w, r)
		if aerr != nil {
			return
		}
		defer release()
		if p.runs == nil {
			writeError(w, runsOff())
			return
		}
		h(w, r, team)
	}
}

// runError maps journal errors to answers; a run another team owns is as
// unknown as one nobody recorded.
func runError(run string, err error) *apiError {
	switch {
	case errors.Is(err, runs.ErrNotFound):
		return &apiError{status: http.StatusNotFound, typ: errInvalidRequest, code: "run_not_found", message: fmt.Sprintf("your team has no run %q", run)}
	case errors.Is(err, runs.ErrExists):
		return &apiError{status: http.StatusConflict, typ: errInvalidRequest, code: "run_exists", message: fmt.Sprintf("your team already has a run %q: import it under another id (as=) or replace it (replace=true)", run)}
	case errors.Is(err, runs.ErrQuota):
		return quotaError(err)
	case errors.Is(err, runs.ErrTooLarge):
		return &apiError{status: http.StatusRequestEntityTooLarge, typ: errInvalidRequest, code: "archive_too_large", message: err.Error()}
	case errors.As(err, new(*http.MaxBytesError)):
		return &apiError{status: http.StatusRequestEntityTooLarge, typ: errInvalidRequest, code: "archive_too_large",
			message: "the upload is larger than an archive within the import limit can be"}
	case errors.Is(err, runs.ErrCorruptArchive):
		return &apiError{status: http.StatusBadRequest, typ: errInvalidRequest, code: "corrupt_archive", message: err.Error()}
	case errors.Is(err, runs.ErrInvalid):
		return badRequest("", "%v", err)
	}
	return journalError(err)
}

// quotaError answers a call refused by the team's run storage quota: 403,
// since the request is fine and only the team's storage is full.
func quotaError(err error) *apiError {
	msg := "your team's run journals are at their storage quota"
	var qe *runs.QuotaError
	if errors.As(err, &qe) {
		msg = fmt.Sprintf("your team's runs hold %d bytes of its %d-byte storage quota, and this needs %d more: delete runs (stint runs delete) or ask for a larger quota (runs.quota_bytes)",
			qe.Used, qe.Quota, qe.Need)
	}
	return &apiError{status: http.StatusForbidden, typ: errInvalidRequest, code: "run_storage_quota_exceeded", message: msg}
}

func (p *Proxy) serveRunList(w http.ResponseWriter, r *http.Request, team *Team) {
	list, err := p.runs.List(r.Context(), team.Name)
	if err != nil {
		writeError(w, journalError(err))
		return
	}
	u, err := p.runs.Usage(r.Context(), team.Name)
	if err != nil {
		writeError(w, journalError(err))
		return
	}
	out := RunList{Runs: make([]RunView, 0, len(list)), StoredBytes: u.Bytes, QuotaBytes: u.QuotaBytes}
	for _, s := range list {
		out.Runs = append(out.Runs, ViewOf(s))
	}
	writeJSON(w, http.StatusOK, out)
}

func (p *Proxy) serveRunShow(w http.ResponseWriter, r *http.Request, team *Team) {
	id := r.PathValue("id")
	s, err := p.runs.Summary(r.Context(), team.Name, id)
	if err != nil {
		writeError(w, runError(id, err))
		return
	}
	d, err := p.detailOf(r, team, s)
	if err != nil {
		writeError(w, runError(id, err))
		return
	}
	writeJSON(w, http.StatusOK, d)
}

func (p *Proxy) serveRunExport(w http.ResponseWriter, r *http.Request, team *Team) {
	id := r.PathValue("id")
	if _, err := p.runs.Summary(r.Context(), team.Name, id); err != nil {
		writeError(w, runError(id, err))
		return
	}
	w.Header().Set("Content-Type", "application/octet-stream")
	w.Header().Set("Content-Disposition", fmt.Sprintf("attachment; filename=%q", id+".stintrun"))
	// Once the archive has started, an error can only cut it short; the
	// importer's checksums refuse a cut archive.
	if err := p.runs.Export(r.Context(), team.Name, id, w); err != nil {
		p.log.Warn("run export failed", "team", team.Name, "run", id, "err", err)
	}
}

func (p *Proxy) serveRunImport(w http.ResponseWriter, r *http.Request, team *Team) {
	q := r.URL.Query()
	opts := p.runImport
	opts.As = q.Get("as")
	if v := q.Get("replace"); v != "" {
		b, err := strconv.ParseBool(v)
		if err != nil {
			writeError(w, badRequest("replace", "replace=%q: want true or false", v))
			return
		}
		opts.Replace = b
	}
	if opts.As != "" {
		if err := runs.ValidID(opts.As); err != nil {
			writeError(w, badRequest("as", "as: %v", err))
			return
		}
	}
	// The upload is bounded as Import bounds the compressed archive.
	limit := cmp.Or(opts.MaxBytes, runs.DefaultMaxArchiveBytes)
	limit += limit/64 + 4096
	if r.ContentLength > limit {
		writeError(w, runError(opts.As, &http.MaxBytesError{Limit: limit}))
		return
	}
	s, err := p.runs.Import(r.Context(), team.Name, http.MaxBytesReader(w, r.Body, limit), opts)
	if err != nil {
		writeError(w, runError(opts.As, err))
		return
	}
	writeJSON(w, http.StatusOK, ViewOf(s))
}

func (p *Proxy) serveRunDelete(w http.ResponseWriter, r *http.Request, team *Team) {
	id := r.PathValue("id")
	if err := p.runs.Delete(r.Context(), team.Name, id); err != nil {
		writeError(w, runError(id, err))
		return
	}
	p.cursor.Reset(team.Name, id)
	writeJSON(w, http.StatusOK, map[string]string{"deleted": id})
}
