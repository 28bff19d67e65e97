package proxy

import (
	"cmp"
	"errors"
	"fmt"
	"net/http"
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
		team, _, release, aerr := p.admit(w, r)
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
	writeJSON(w, http.StatusOK, ViewOf(s))
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
