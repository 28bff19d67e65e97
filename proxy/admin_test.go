package proxy_test

import (
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/proxy"
)

// adminDo sends an admin request with key (none when empty).
func (r *rig) adminDo(method, path, key, body string) (int, []byte) {
	r.t.Helper()
	req, err := http.NewRequest(method, r.srv.URL+proxy.AdminPrefix+path, strings.NewReader(body))
	require.NoError(r.t, err)
	if key != "" {
		req.Header.Set("Authorization", "Bearer "+key)
	}
	resp, err := http.DefaultClient.Do(req)
	require.NoError(r.t, err)
	defer resp.Body.Close()
	b, _ := io.ReadAll(resp.Body)
	return resp.StatusCode, b
}

func errorCode(t *testing.T, b []byte) string {
	t.Helper()
	var e struct {
		Error struct {
			Code string `json:"code"`
		} `json:"error"`
	}
	require.NoError(t, json.Unmarshal(b, &e), "error body %s", b)
	return e.Error.Code
}

func TestAdminRefusals(t *testing.T) {
	r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, 1)})
	tests := []struct {
		name, method, path, key, body string
		status                        int
		code                          string
	}{
		{"no key", "GET", "statement", "", "", 401, "missing_key"},
		{"a team's key", "GET", "statement", "lab-key", "", 401, "invalid_key"},
		{"bad since", "GET", "statement?since=yesterday", adminKey, "", 400, "invalid_value"},
		{"bad grouping", "GET", "statement?by=colour", adminKey, "", 400, "invalid_value"},
		{"unknown team", "PUT", "budgets/ghost", adminKey, `{"usd":1,"per":"day"}`, 404, "unknown_team"},
		{"unknown field", "PUT", "budgets/lab", adminKey, `{"usd":1,"per":"day","color":"red"}`, 400, "invalid_value"},
		{"malformed JSON", "PUT", "budgets/lab", adminKey, `{"usd":`, 400, "invalid_value"},
		{"two objects", "PUT", "budgets/lab", adminKey, `{"usd":1,"per":"day"}{}`, 400, "invalid_value"},
		{"no usd", "PUT", "budgets/lab", adminKey, `{"per":"day"}`, 400, "invalid_value"},
		{"negative usd", "PUT", "budgets/lab", adminKey, `{"usd":-1,"per":"day"}`, 400, "invalid_value"},
		{"bad period", "PUT", "budgets/lab", adminKey, `{"usd":1,"per":"fortnight"}`, 400, "invalid_value"},
		{"usd as text", "PUT", "budgets/lab", adminKey, `{"usd":"1","per":"day"}`, 400, "invalid_value"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			status, b := r.adminDo(tt.method, tt.path, tt.key, tt.body)
			assert.Equal(t, tt.status, status, "%s %s: %d %s, want %d %s", tt.method, tt.path, status, b, tt.status, tt.code)
			assert.Equal(t, tt.code, errorCode(t, b), "%s %s: %d %s, want %d %s", tt.method, tt.path, status, b, tt.status, tt.code)
		})
	}
	// None of the refused changes took: the configured budget stands.
	status, b := r.adminDo("GET", "budgets", adminKey, "")
	assert.Equal(t, 200, status, "budgets after refusals: %d %s, want the configured 1.00", status, b)
	assert.Contains(t, string(b), `"limit_usd":"1.00"`, "budgets after refusals: %d %s, want the configured 1.00", status, b)
}

func TestAdminOffWithoutKeys(t *testing.T) {
	r := newRig(t, withTeams(teamWithKey("lab", "lab-key")))
	status, b := r.adminDo("GET", "statement", "anything", "")
	assert.Equal(t, http.StatusForbidden, status, "admin without keys: %d %s, want 403 admin_off", status, b)
	assert.Equal(t, "admin_off", errorCode(t, b), "admin without keys: %d %s, want 403 admin_off", status, b)
}

// TestAdminOpenInOpenMode: a proxy without teams (open mode: no key needed
// anywhere, loopback only) answers its admin endpoints without a key too;
// without prices there is no spend control, and it says so.
func TestAdminOpenInOpenMode(t *testing.T) {
	r := newRig(t)
	status, b := r.adminDo("GET", "statement", "", "")
	assert.Equal(t, http.StatusNotFound, status, "open-mode statement without spend control: %d %s, want 404 spend_off", status, b)
	assert.Equal(t, "spend_off", errorCode(t, b), "open-mode statement without spend control: %d %s, want 404 spend_off", status, b)
	assert.Contains(t, string(b), "nothing is recorded", "open-mode statement without spend control: %d %s, want 404 spend_off", status, b)
}

// TestAdminSetsBudgetAndReadsStatement lowers a team's budget at run time (the
// next call is refused), reads spend that matches the answers' headers,
// and clears the override (calls are admitted again).
func TestAdminSetsBudgetAndReadsStatement(t *testing.T) {
	r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, 1)})
	var spent int64
	for i := range 3 {
		got := r.complete(greedy(fmt.Sprintf("ledger line %d for the kiln", i), "max_tokens", 8))
		require.Equal(t, 200, got.status, "call %d: %d %s", i, got.status, got.body)
		spent += headerNanos(t, got.header, proxy.HeaderCost)
	}
	r.complete(greedy("ledger line 0 for the kiln", "max_tokens", 8)) // a hit

	var st budget.Statement
	// The hit's saving is journaled in the background; wait until it is.
	waitFor(t, "the hit in the journal", func() bool {
		status, b := r.adminDo("GET", "statement?by=team", adminKey, "")
		require.Equal(t, 200, status, "statement: %s", b)
		require.NoError(t, json.Unmarshal(b, &st), "statement: %s", b)
		return st.Total.Requests == 4
	})
	assert.Equal(t, int64(4), st.Total.Requests, "statement total %+v, want 4 requests, 3 upstream calls, spent %s", st.Total, budget.Nanos(spent))
	assert.Equal(t, int64(3), st.Total.UpstreamCalls, "statement total %+v, want 4 requests, 3 upstream calls, spent %s", st.Total, budget.Nanos(spent))
	assert.Equal(t, budget.Nanos(spent).String(), st.Total.SpentUSD, "statement total %+v, want 4 requests, 3 upstream calls, spent %s", st.Total, budget.Nanos(spent))
	if assert.Len(t, st.Budgets, 1, "standings %+v, want lab having spent %s", st.Budgets, budget.Nanos(spent)) {
		assert.Equal(t, "lab", st.Budgets[0].Team, "standings %+v, want lab having spent %s", st.Budgets, budget.Nanos(spent))
		assert.Equal(t, budget.Nanos(spent).String(), st.Budgets[0].SpentUSD, "standings %+v, want lab having spent %s", st.Budgets, budget.Nanos(spent))
	}

	// A budget below what is spent: the next miss is refused.
	status, b := r.adminDo("PUT", "budgets/lab", adminKey, `{"usd":0.000001,"per":"total"}`)
	require.Equal(t, 200, status, "set budget: %d %s", status, b)
	before := r.upstreamGenerations()
	got := r.complete(greedy("a new line after the cut", "max_tokens", 8))
	assert.Equal(t, http.StatusPaymentRequired, got.status, "after lowering the budget: %d %s, want 402", got.status, got.body)
	assert.Equal(t, before, r.upstreamGenerations(), "a refused call reached the upstream")
	// Cleared: the configured 1 USD applies again.
	status, b = r.adminDo("DELETE", "budgets/lab", adminKey, "")
	require.Equal(t, 200, status, "clear budget: %d %s", status, b)
	require.Contains(t, string(b), `"limit_usd":"1.00"`, "clear budget: %d %s", status, b)
	got = r.complete(greedy("a new line after the cut", "max_tokens", 8))
	assert.Equal(t, 200, got.status, "after clearing the override: %d %s, want 200", got.status, got.body)
	// A team without a configured budget can be given one.
	status, b = r.adminDo("PUT", "budgets/kiln", adminKey, `{"usd":2.5,"per":"week"}`)
	assert.Equal(t, 200, status, "budget for kiln: %d %s", status, b)
	assert.Contains(t, string(b), `"team":"kiln"`, "budget for kiln: %d %s", status, b)
}

// TestAdminPeriodChangeKeepsTheSpend is the reported case: after a team has
// spent under its configured total budget, a budget per day set through the
// admin endpoint shows today's spend and refuses what no longer fits.
func TestAdminPeriodChangeKeepsTheSpend(t *testing.T) {
	r := newSpendRig(t, guard.TeamPolicy{Budget: usdCap(t, 1)})
	var spent int64
	for i := range 3 {
		got := r.complete(greedy(fmt.Sprintf("a line of the day %d", i), "max_tokens", 8))
		require.Equal(t, http.StatusOK, got.status, "%s", got.body)
		spent += headerNanos(t, got.header, proxy.HeaderCost)
	}
	// Room for less than one more call today.
	limit := budget.Nanos(spent + spent/6)
	status, b := r.adminDo("PUT", "budgets/lab", adminKey, fmt.Sprintf(`{"usd":%s,"per":"day"}`, limit))
	require.Equal(t, http.StatusOK, status, "%s", b)
	var answer struct {
		Budgets []budget.Standing `json:"budgets"`
	}
	require.NoError(t, json.Unmarshal(b, &answer))
	require.Len(t, answer.Budgets, 1)
	assert.Equal(t, budget.Day, answer.Budgets[0].Period)
	assert.Equal(t, budget.Nanos(spent).String(), answer.Budgets[0].SpentUSD, "today's spend under the new daily budget")

	before := r.upstreamGenerations()
	got := r.complete(greedy("one line too many", "max_tokens", 8))
	assert.Equal(t, http.StatusPaymentRequired, got.status, "%s", got.body)
	assert.Equal(t, before, r.upstreamGenerations(), "a refused call reached the upstream")
}
