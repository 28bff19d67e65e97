package proxy_test

import (
	"fmt"
	"net/http"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/retry"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestRateLimitStormSpendsTheRetryBudget has an upstream answer every call
// with 429: retries after a 429 come out of a budget shared by the
// upstream's calls, so the storm costs the upstream little more than one
// call per request instead of one per attempt allowed.
func TestRateLimitStormSpendsTheRetryBudget(t *testing.T) {
	noLeaks(t)
	const (
		requests = 60
		attempts = 3
		share    = 0.1
		reserve  = 5
	)
	sl := &sleeps{}
	r := newRig(t, withResilience(breaker.Settings{Off: true},
		retry.Policy{Attempts: attempts, BudgetShare: share, BudgetReserve: reserve}, sl))
	r.up.FailRatio(1, upstreamtest.Fault{Status: http.StatusTooManyRequests})
	for i := range requests {
		got := r.complete(greedy(fmt.Sprintf("storm call %d", i)))
		require.Equal(t, http.StatusTooManyRequests, got.status, "call %d: %s", i, got.body)
	}
	calls := r.up.Calls().Completions
	t.Logf("%d requests answered 429 made %d upstream calls", requests, calls)
	// Each request's own call, the reserve, and a tenth of a retry per call.
	most := requests + reserve + requests/10 // share: a tenth
	assert.LessOrEqual(t, calls, most, "upstream calls in the storm (%d allowed by the attempts)", requests*attempts)
	assert.Greater(t, calls, requests, "the budget's reserve was not used")
	assert.Equal(t, float64(calls-requests), r.metric("stint_upstream_retries_total", "upstream", "fake", "reason", "429"))
	// A refused retry ends the request's retries: one refusal per request
	// the budget could not pay for in full.
	retried := calls - requests
	full := retried / (attempts - 1) // at most this many got every retry
	assert.GreaterOrEqual(t, r.metric("stint_upstream_retries_denied_total", "upstream", "fake"), float64(requests-full))

	// Other failures are not paid from it: a 503 is still retried.
	r.up.ClearFaults()
	r.up.FailNext(1, upstreamtest.Fault{Status: http.StatusServiceUnavailable})
	before := r.up.Calls().Completions
	got := r.complete(greedy("after the storm"))
	assert.Equal(t, http.StatusOK, got.status, "%s", got.body)
	assert.Equal(t, 2, r.up.Calls().Completions-before)
}
