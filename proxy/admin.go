package proxy

import (
	"context"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"net/http"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
)

// AdminPrefix starts the path of every admin endpoint.
const AdminPrefix = "/stint/admin/"

// SpendAdmin reads spend and sets budgets for the admin endpoints;
// *guard.Guard implements it. The proxy uses it when Options.Spend does.
type SpendAdmin interface {
	Statement(ctx context.Context, q budget.Query) (budget.Statement, error)
	SetBudget(ctx context.Context, team string, c *budget.Cap) error
}

// BudgetChange is the body of PUT /stint/admin/budgets/{team}.
type BudgetChange struct {
	USD *float64      `json:"usd"` // the budget per period, in USD; required
	Per budget.Period `json:"per"` // day, week, month or total; required
}

// maxAdminBody bounds an admin request body.
const maxAdminBody = 64 << 10

func (p *Proxy) routeAdmin(mux *http.ServeMux) {
	mux.HandleFunc("GET "+AdminPrefix+"statement", p.admin(p.serveAdminStatement))
	mux.HandleFunc("GET "+AdminPrefix+"budgets", p.admin(p.serveAdminBudgets))
	mux.HandleFunc("PUT "+AdminPrefix+"budgets/{team}", p.admin(p.serveSetBudget))
	mux.HandleFunc("DELETE "+AdminPrefix+"budgets/{team}", p.admin(p.serveSetBudget))
}

// admin wraps an admin handler with the admin key check. Without admin keys
// configured the endpoints are off, except in open mode (no teams), where
// they answer anyone, like every other endpoint.
func (p *Proxy) admin(h func(http.ResponseWriter, *http.Request, SpendAdmin)) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		if len(p.adminKeys) == 0 && p.open != nil {
			p.adminServe(w, r, h)
			return
		}
		if len(p.adminKeys) == 0 {
			writeError(w, &apiError{status: http.StatusForbidden, typ: errPermission, code: "admin_off",
				message: "admin endpoints are off: configure admin.keys"})
			return
		}
		key, ok := bearer(r.Header.Get("Authorization"))
		if !ok {
			refuseConnection(w, &apiError{status: http.StatusUnauthorized, typ: errAuthentication, code: "missing_key", message: "missing bearer key: send Authorization: Bearer <admin key>"})
			return
		}
		sum := sha256.Sum256([]byte(key))
		match := 0
		for _, h := range p.adminKeys {
			match |= subtle.ConstantTimeCompare(sum[:], h[:])
		}
		if match != 1 {
			refuseConnection(w, &apiError{status: http.StatusUnauthorized, typ: errAuthentication, code: "invalid_key", message: "not an admin key"})
			return
		}
		p.adminServe(w, r, h)
	}
}

// adminServe runs an admin handler once the caller is admitted.
func (p *Proxy) adminServe(w http.ResponseWriter, r *http.Request, h func(http.ResponseWriter, *http.Request, SpendAdmin)) {
	sa, ok := p.spend.(SpendAdmin)
	if !ok {
		writeError(w, &apiError{status: http.StatusNotFound, typ: errInvalidRequest, code: "spend_off",
			message: "spend control is off: the config prices no model, so nothing is recorded"})
		return
	}
	h(w, r, sa)
}

func (p *Proxy) serveAdminStatement(w http.ResponseWriter, r *http.Request, sa SpendAdmin) {
	q := r.URL.Query()
	since := q.Get("since")
	if since == "" {
		since = "7d"
	}
	from, err := budget.ParseSince(since, p.now())
	if err != nil {
		writeError(w, badRequest("since", "since %v", err))
		return
	}
	by := budget.GroupBy(q.Get("by"))
	if by == "" {
		by = budget.ByTeam
	}
	switch by {
	case budget.ByModel, budget.ByTeam, budget.ByRun, budget.ByDay:
	default:
		writeError(w, badRequest("by", "by %q: want model, team, run or day", by))
		return
	}
	st, err := sa.Statement(r.Context(), budget.Query{Since: from, Team: q.Get("team"), By: by})
	if err != nil {
		writeError(w, spendError(err))
		return
	}
	writeJSON(w, http.StatusOK, st)
}

// budgetsAnswer is the body of GET /stint/admin/budgets.
type budgetsAnswer struct {
	Budgets []budget.Standing `json:"budgets"`
}

func (p *Proxy) serveAdminBudgets(w http.ResponseWriter, r *http.Request, sa SpendAdmin) {
	st, err := sa.Statement(r.Context(), budget.Query{Since: p.now(), Team: r.URL.Query().Get("team"), By: budget.ByTeam})
	if err != nil {
		writeError(w, spendError(err))
		return
	}
	writeJSON(w, http.StatusOK, budgetsAnswer{Budgets: nonNil(st.Budgets)})
}

func (p *Proxy) serveSetBudget(w http.ResponseWriter, r *http.Request, sa SpendAdmin) {
	team := r.PathValue("team")
	if p.teamNamed(team) == nil {
		writeError(w, &apiError{status: http.StatusNotFound, typ: errInvalidRequest, code: "unknown_team", param: "team",
			message: fmt.Sprintf("no team %q in the config", team)})
		return
	}
	var c *budget.Cap
	if r.Method == http.MethodPut {
		var ch BudgetChange
		dec := json.NewDecoder(http.MaxBytesReader(w, r.Body, maxAdminBody))
		dec.DisallowUnknownFields()
		if err := dec.Decode(&ch); err != nil {
			writeError(w, badRequest("", "budget body: %v (want {\"usd\": 25.00, \"per\": \"month\"})", err))
			return
		}
		if _, err := dec.Token(); !errors.Is(err, io.EOF) {
			writeError(w, badRequest("", "budget body: one JSON object expected"))
			return
		}
		if ch.USD == nil || math.IsNaN(*ch.USD) || *ch.USD < 0 {
			writeError(w, badRequest("usd", "usd is required and must not be negative"))
			return
		}
		limit, err := budget.FromUSD(*ch.USD)
		if err != nil {
			writeError(w, badRequest("usd", "usd: %v", err))
			return
		}
		if err := ch.Per.Validate(); err != nil {
			writeError(w, badRequest("per", "per %q: want day, week, month or total", ch.Per))
			return
		}
		c = &budget.Cap{Limit: limit, Period: ch.Per}
	}
	if err := sa.SetBudget(r.Context(), team, c); err != nil {
		if errors.Is(err, guard.ErrNoOverrides) {
			writeError(w, &apiError{status: http.StatusNotImplemented, typ: errServer, code: "no_override_store", message: err.Error()})
			return
		}
		writeError(w, spendError(err))
		return
	}
	p.left.forget(team)
	p.log.Info("team budget changed", "team", team, "budget_usd", budgetText(c))
	p.serveAdminBudgets(w, r, sa)
}

func budgetText(c *budget.Cap) string {
	if c == nil {
		return "as configured"
	}
	return c.Limit.String() + " per " + string(c.Period)
}

// teamNamed returns the configured team called name, or nil.
func (p *Proxy) teamNamed(name string) *Team {
	if p.open != nil && p.open.Name == name {
		return p.open
	}
	for i := range p.teams {
		if p.teams[i].Name == name {
			return &p.teams[i]
		}
	}
	return nil
}

func nonNil[T any](s []T) []T {
	if s == nil {
		return []T{}
	}
	return s
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		writeError(w, &apiError{status: http.StatusInternalServerError, typ: errServer, message: "encode answer"})
		return
	}
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(status)
	_, _ = w.Write(append(b, '\n'))
}
