package proxy_test

import (
	"fmt"
	"net/http"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestBreakerClosesOnAnEarlyProbeAfterRecovery trips a breaker that would
// stay open for an hour, lets the upstream recover, and sends traffic:
// some call goes through as an early probe long before the hour is out,
// and its success closes the breaker. Meanwhile the other calls are
// refused without reaching the upstream.
func TestBreakerClosesOnAnEarlyProbeAfterRecovery(t *testing.T) {
	noLeaks(t)
	r := newRig(t, withResilience(breaker.Settings{ConsecutiveFailures: 2, FailureRatio: -1, OpenFor: time.Hour, ProbeEvery: 20 * time.Millisecond}, noRetries, nil))
	r.up.FailNext(2, upstreamtest.Fault{Status: http.StatusInternalServerError})
	for i := range 2 {
		got := r.complete(greedy(fmt.Sprintf("failing %d", i)))
		require.Equal(t, http.StatusInternalServerError, got.status)
	}
	require.Equal(t, 2.0, r.breakerState(), "the breaker did not open")
	tripped := r.upstreamGenerations()

	refused, i := 0, 0
	waitFor(t, "an early probe to get through", func() bool {
		i++
		got := r.complete(greedy(fmt.Sprintf("after recovery %d", i)))
		if got.status == http.StatusServiceUnavailable {
			refused++
			return false
		}
		require.Equal(t, http.StatusOK, got.status, "%s", got.body)
		return true
	})
	t.Logf("%d calls refused before an early probe closed the breaker", refused)
	assert.Equal(t, tripped+1, r.upstreamGenerations(), "refused calls reached the upstream")
	assert.Equal(t, 0.0, r.breakerState(), "the breaker is not closed after the probe")
	got := r.complete(greedy("and after"))
	assert.Equal(t, http.StatusOK, got.status)
}
