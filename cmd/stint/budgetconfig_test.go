package main

import (
	"errors"
	"os"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
	"github.com/stintlab/stint/budget/boltledger"
	"github.com/stintlab/stint/budget/guard"
	"github.com/stintlab/stint/budget/ratelimit"
	"github.com/stintlab/stint/budget/tokens"
)

// teamKey is a team with one key whose id is "aaaaaaaaaaaa".
const teamKey = "teams:\n  - name: lab\n    keys: [\"sha256:" + "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa" + "\"]\n"

func TestStatementConfigErrorsNameFieldAndLine(t *testing.T) {
	tests := []struct {
		name      string
		yaml      string
		wantLine  int
		wantField string
		wantText  string
	}{
		{"negative budget", teamKey + "    budget: {usd: -5, per: month}\n", 4, "teams[0].budget.usd", "negative"},
		{"malformed budget", teamKey + "    budget:\n      usd: lots\n      per: month\n", 5, "teams[0].budget.usd", "not a number"},
		{"budget without usd", teamKey + "    budget: {per: month}\n", 4, "teams[0].budget.usd", "required"},
		{"bad period", teamKey + "    budget: {usd: 5, per: fortnight}\n", 4, "teams[0].budget.per", "day, week, month or total"},
		{"NaN budget", teamKey + "    budget: {usd: NaN, per: day}\n", 4, "teams[0].budget.usd", "finite"},
		{"negative price", "prices:\n  demo-model:\n    input: 0.5\n    output: -1.5\n", 4, "prices.demo-model.output", "negative"},
		{"malformed price", "prices:\n  demo-model: {input: cheap, output: 1}\n", 2, "prices.demo-model.input", "not a number"},
		{"price list", "prices:\n  demo-model:\n    input: [1]\n    output: 1\n", 3, "prices.demo-model.input", "not a number"},
		{"price without output", "prices:\n  demo-model: {input: 1}\n", 2, "prices.demo-model", "output is required"},
		{"absurd price", "prices:\n  demo-model: {input: 1e9, output: 1}\n", 2, "prices.demo-model", "sanity"},
		{"negative cached", "default_price: {input: 1, output: 1, cached_input: -0.1}\n", 1, "default_price.cached_input", "negative"},
		{"negative global", "budget:\n  global: {usd: -1, per: month}\n", 2, "budget.global.usd", "negative"},
		{"negative rpm", teamKey + "    limits: {requests_per_minute: -1}\n", 4, "teams[0].limits.requests_per_minute", "negative"},
		{"fractional tpm", teamKey + "    limits:\n      tokens_per_minute: 1.5\n", 5, "teams[0].limits.tokens_per_minute", "whole"},
		{"upstream limits", "upstreams:\n  - url: http://x\n    limits: {tokens_per_minute: many}\n", 3, "upstreams[0].limits.tokens_per_minute", "not a number"},
		{"key id unknown", teamKey + "    key_budgets:\n      \"bbbbbbbbbbbb\": {usd: 1, per: day}\n", 5, "teams[0].key_budgets.bbbbbbbbbbbb", "none of the team's keys"},
		{"key id form", teamKey + "    key_budgets:\n      \"sha256:aaaa\": {usd: 1, per: day}\n", 5, "teams[0].key_budgets.sha256:aaaa", "12 hex"},
		{"key budget negative", teamKey + "    key_budgets:\n      \"aaaaaaaaaaaa\": {usd: -1, per: day}\n", 5, "teams[0].key_budgets.aaaaaaaaaaaa.usd", "negative"},
		{"team name", "teams:\n  - name: \"data science\"\n    keys: [\"sha256:" + strings.Repeat("c", 64) + "\"]\n", 2, "teams[0].name", "letters"},
		{"time zone", "budget:\n  time_zone: Mars/Olympus\n", 2, "budget.time_zone", "IANA"},
		{"negative lease", "budget:\n  lease: -1m\n", 2, "budget.lease", "negative"},
		{"negative max_wait", "budget:\n  max_wait: -1s\n", 2, "budget.max_wait", "negative"},
		{"zero output cap", "budget:\n  output_caps:\n    demo-model: 0\n", 3, "budget.output_caps.demo-model", "positive"},
		{"default cap", "budget:\n  default_output_cap: -3\n", 2, "budget.default_output_cap", "negative"},
		{"tokenizer", "budget:\n  tokenizers:\n    demo-model: p50k_base\n", 3, "budget.tokenizers.demo-model", "cl100k_base"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(tt.yaml))
			var ce *ConfigError
			require.Truef(t, errors.As(err, &ce), "got %v, want a ConfigError", err)
			assert.Falsef(t, ce.Field != tt.wantField || ce.Line != tt.wantLine, "error on %s line %d, want %s line %d (%v)", ce.Field, ce.Line, tt.wantField, tt.wantLine, err)
			assert.Falsef(t, !strings.Contains(err.Error(), tt.wantText) || !strings.Contains(err.Error(), "line "+strconv.Itoa(tt.wantLine)), "error %q does not mention %q and line %d", err, tt.wantText, tt.wantLine)
		})
	}
}

func TestGuardConfig(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader(`
upstreams:
  - url: http://127.0.0.1:1/v1
    limits: {requests_per_minute: 100}
` + teamKey + `    budget: {usd: 25.00, per: month}
    limits: {requests_per_minute: 600, tokens_per_minute: 200000}
    key_budgets:
      "aaaaaaaaaaaa": {usd: 0.5, per: day}
prices:
  demo-model: {input: 0.50, output: 1.50, cached_input: 0.25}
default_price: {input: 10, output: 30}
budget:
  global: {usd: 100, per: week}
  time_zone: Europe/Berlin
  lease: 2m
  max_wait: 0s
  output_caps: {demo-model: 512}
  default_output_cap: 1000
  tokenizers: {demo-model: o200k_base}
`))
	require.NoError(t, err)
	g, err := guardConfig(cfg)
	require.NoError(t, err)
	lab := g.Teams["lab"]
	checks := []struct {
		what      string
		got, want any
	}{
		{"team budget", *lab.Budget, budget.Cap{Limit: 25 * budget.NanosPerUSD, Period: budget.Month}},
		{"key budget", *lab.Keys["aaaaaaaaaaaa"], budget.Cap{Limit: budget.NanosPerUSD / 2, Period: budget.Day}},
		{"team limits", lab.Limits, guard.Limits{RequestsPerMinute: 600, TokensPerMinute: 200000}},
		{"upstream limits", g.Upstreams["upstream-0"], guard.Limits{RequestsPerMinute: 100}},
		{"global", *g.Global, budget.Cap{Limit: 100 * budget.NanosPerUSD, Period: budget.Week}},
		{"zone", g.Location.String(), "Europe/Berlin"},
		{"lease", g.Lease, 2 * time.Minute},
		{"max_wait 0s means no wait", g.MaxWait < 0, true},
		{"output cap", g.OutputCaps["demo-model"], int64(512)},
		{"default cap", g.DefaultOutputCap, int64(1000)},
		{"tokenizer", g.Encodings["demo-model"], tokens.O200kBase},
		{"price", g.Prices.Models["demo-model"].Input, 0.50},
		{"cached price", *g.Prices.Models["demo-model"].CachedInput, 0.25},
		{"default price", g.Prices.Default.Output, 30.0},
	}
	for _, c := range checks {
		assert.Equal(t, c.want, c.got, "%s = %v, want %v", c.what, c.got, c.want)
	}
}

// TestExampleConfigBuildsAGuard checks that the shipped example's spend
// settings are accepted by the guard itself, not only by ParseConfig.
func TestExampleConfigBuildsAGuard(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader(exampleConfig))
	require.NoError(t, err)
	gc, err := guardConfig(cfg)
	require.NoError(t, err)
	l, err := boltledger.New(openTestDB(t), boltledger.Options{Location: gc.Location})
	require.NoError(t, err)
	_, err = guard.New(gc, l, l, &ratelimit.Local{}, nil)
	assert.NoError(t, err, "example config: guard.New: %v", err)
	assert.Falsef(t, gc.Teams["lab"].Budget == nil || gc.Teams["lab"].Keys["000000000000"] == nil, "example team lab: %+v, want a budget and a key budget", gc.Teams["lab"])
}

// TestPricesExampleParses checks that the shipped price file is valid
// config as it stands.
func TestPricesExampleParses(t *testing.T) {
	src, err := os.ReadFile("../../deploy/prices.example.yaml")
	require.NoError(t, err)
	assert.True(t, strings.HasPrefix(string(src), "# example prices, verify before use"), "deploy/prices.example.yaml must start with its warning")
	cfg, err := ParseConfig(strings.NewReader(string(src)))
	require.NoError(t, err)
	_, err = guardConfig(cfg)
	assert.Falsef(t, err != nil || len(cfg.Prices) == 0, "guardConfig: %v, %d prices", err, len(cfg.Prices))
}
