package main

import (
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/breaker"
	"github.com/stintlab/stint/proxy/retry"
)

func TestUpstreamResilienceErrorsNameFieldAndLine(t *testing.T) {
	const head = "upstreams:\n  - name: main\n    url: http://127.0.0.1:1/v1\n"
	tests := []struct {
		name     string
		yaml     string
		wantLine int
		wantText string
	}{
		{"negative max_concurrent", head + "    max_concurrent: -2\n", 4, "upstreams[0].max_concurrent"},
		{"ratio above one", head + "    breaker:\n      failure_ratio: 1.5\n", 5, "upstreams[0].breaker.failure_ratio"},
		{"consecutive below -1", head + "    breaker:\n      consecutive_failures: -3\n", 5, "breaker.consecutive_failures"},
		{"negative open_for", head + "    breaker:\n      open_for: -1s\n", 5, "breaker.open_for"},
		{"negative window", head + "    breaker:\n      window: -1m\n", 5, "breaker.window"},
		{"negative probes", head + "    breaker:\n      probes: -1\n", 5, "breaker.probes"},
		{"negative probe_every", head + "    breaker:\n      probe_every: -1s\n", 5, "breaker.probe_every"},
		{"negative min_requests", head + "    breaker:\n      min_requests: -1\n", 5, "breaker.min_requests"},
		{"both rules off", head + "    breaker:\n      consecutive_failures: -1\n      failure_ratio: -1\n", 5, "enabled: false"},
		{"unknown breaker key", head + "    breaker:\n      trip_after: 3\n", 5, "trip_after"},
		{"negative attempts", head + "    retry:\n      attempts: -1\n", 5, "retry.attempts"},
		{"negative base_delay", head + "    retry:\n      base_delay: -1s\n", 5, "retry.base_delay"},
		{"negative max_delay", head + "    retry:\n      max_delay: -1s\n", 5, "retry.max_delay"},
		{"bad delay", head + "    retry:\n      max_delay: later\n", 5, "duration"},
		{"budget share above one", head + "    retry:\n      budget_share: 2\n", 5, "retry.budget_share"},
		{"budget reserve below -1", head + "    retry:\n      budget_reserve: -2\n", 5, "retry.budget_reserve"},
		{"unknown fallback", head + "    fallback: [nowhere]\n", 4, `"nowhere"`},
		{"own fallback", head + "    fallback: [main]\n", 4, "its own fallback"},
		{"fallback twice", head + "    fallback: [b, b]\n  - name: b\n    url: http://127.0.0.1:2/v1\n", 4, "twice"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(tt.yaml))
			require.Error(t, err, "got no error")
			assert.Contains(t, err.Error(), tt.wantText, "error %q does not mention %q", err, tt.wantText)
			assert.Contains(t, err.Error(), "line "+strconv.Itoa(tt.wantLine), "error %q does not name line %d", err, tt.wantLine)
		})
	}
}

func TestUpstreamResilienceValues(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader(`
upstreams:
  - name: main
    url: http://127.0.0.1:1/v1
    max_concurrent: 8
    fallback: [spare]
    breaker:
      consecutive_failures: 3
      failure_ratio: -1
      open_for: 10s
      probes: 2
    retry:
      attempts: 1
  - name: spare
    url: http://127.0.0.1:2/v1
    breaker: {enabled: false}
    retry: {attempts: 4, base_delay: 100ms, max_delay: 2s}
  - name: plain
    url: http://127.0.0.1:3/v1
`))
	require.NoError(t, err)
	ups, _, err := buildUpstreams(t.Context(), cfg.Upstreams)
	require.NoError(t, err)
	main, spare, plain := ups[0], ups[1], ups[2]
	assert.Equal(t, breaker.Settings{ConsecutiveFailures: 3, FailureRatio: -1, OpenFor: 10 * time.Second, Probes: 2, ProbeEvery: 10 * time.Second / 6}, main.Breaker, "main breaker")
	assert.Falsef(t, main.Retry.MaxAttempts() != 1 || main.MaxConcurrent != 8 || !slices.Equal(main.Fallback, []string{"spare"}), "main: attempts %d, max_concurrent %d, fallback %v", main.Retry.MaxAttempts(), main.MaxConcurrent, main.Fallback)
	assert.True(t, spare.Breaker.Off, "spare: enabled: false did not turn the breaker off")
	assert.Equal(t, retry.Policy{Attempts: 4, Base: 100 * time.Millisecond, MaxDelay: 2 * time.Second}, spare.Retry, "spare retry")
	// Nothing said: breaker on and retries on, with the defaults.
	assert.Falsef(t, plain.Breaker != (breaker.Settings{ProbeEvery: breaker.DefaultOpenFor / 6}) || plain.Retry.MaxAttempts() != retry.DefaultAttempts || plain.MaxConcurrent != 0, "plain: %+v %+v %d, want the defaults", plain.Breaker, plain.Retry, plain.MaxConcurrent)
}

// The example config's upstream section spells out the defaults: parsing it
// gives the same settings as leaving the sections out.
func TestExampleUpstreamSpellsOutTheDefaults(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader(exampleConfig))
	require.NoError(t, err, "example config")
	u := cfg.Upstreams[0]
	want := breaker.Settings{
		ConsecutiveFailures: breaker.DefaultConsecutiveFailures, FailureRatio: breaker.DefaultFailureRatio,
		MinRequests: breaker.DefaultMinRequests, Window: breaker.DefaultWindow, OpenFor: breaker.DefaultOpenFor, Probes: breaker.DefaultProbes,
		ProbeEvery: breaker.DefaultOpenFor / 6,
	}
	got := u.breakerSettings()
	assert.Equal(t, want, got, "example breaker %+v, want the defaults %+v", got, want)
	assert.Equal(t, retry.Policy{Attempts: retry.DefaultAttempts, Base: retry.DefaultBase, MaxDelay: retry.DefaultMaxDelay,
		BudgetShare: retry.DefaultBudgetShare, BudgetReserve: retry.DefaultBudgetReserve}, u.retryPolicy(), "example retry, want the defaults")
}
