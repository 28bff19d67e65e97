package main

import (
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestStoreConfigErrorsNameField(t *testing.T) {
	const head = "store:\n  redis:\n    addrs: [\"127.0.0.1:7000\"]\n"
	tests := []struct {
		name     string
		yaml     string
		wantLine int
		wantText string
	}{
		{"no addrs", "store:\n  redis:\n    prefix: x\n", 2, "store.redis.addrs"},
		{"negative hot_ttl", head + "    hot_ttl: -1s\n", 4, "store.redis.hot_ttl"},
		{"tiny lease", head + "    lease: 10ms\n", 4, "store.redis.lease"},
		{"negative lease", head + "    lease: -3s\n", 4, "store.redis.lease"},
		{"cache not a bool", head + "    cache: sometimes\n", 4, "want true or false"},
		{"brace in prefix", head + "    prefix: \"a{b}\"\n", 4, "store.redis.prefix"},
		{"tiny slot_refresh", head + "    slot_refresh: 5ms\n", 4, "store.redis.slot_refresh"},
		{"negative slot_refresh", head + "    slot_refresh: -1s\n", 4, "store.redis.slot_refresh"},
		{"negative ledger_replicas", head + "    ledger_replicas: -1\n", 4, "store.redis.ledger_replicas"},
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

func TestStoreConfigValues(t *testing.T) {
	tests := []struct {
		name        string
		extra       string
		shared      bool
		hotTTL      time.Duration
		lease       time.Duration
		slotRefresh time.Duration
		replicas    int
	}{
		{"defaults", "", true, defaultHotTTL, defaultLease, defaultSlotRefresh, defaultLedgerReplicas},
		{"set", "    cache: true\n    hot_ttl: 500ms\n    lease: 3s\n    slot_refresh: 250ms\n    ledger_replicas: 2\n", true, 500 * time.Millisecond, 3 * time.Second, 250 * time.Millisecond, 2},
		{"cache off, no replica wait", "    cache: false\n    ledger_replicas: 0\n", false, defaultHotTTL, defaultLease, defaultSlotRefresh, 0},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			cfg, err := ParseConfig(strings.NewReader("store:\n  redis:\n    addrs: [\"127.0.0.1:7000\"]\n" + tt.extra))
			require.NoError(t, err)
			r := cfg.Store.Redis
			assert.Falsef(t, r.sharedCache() != tt.shared || r.hotTTL() != tt.hotTTL || r.lease() != tt.lease, "shared %v, hot_ttl %v, lease %v; want %v, %v, %v", r.sharedCache(), r.hotTTL(), r.lease(), tt.shared, tt.hotTTL, tt.lease)
			assert.Falsef(t, r.slotRefresh() != tt.slotRefresh || r.ledgerReplicas() != tt.replicas, "slot_refresh %v, ledger_replicas %d; want %v, %d", r.slotRefresh(), r.ledgerReplicas(), tt.slotRefresh, tt.replicas)
			got := r.ledgerOptions(nil)
			assert.Falsef(t, got.Replicas != tt.replicas || got.ReplicaWait != r.timeout()/2, "ledger options %+v, want %d replicas waited for up to %v", got, tt.replicas, r.timeout()/2)
		})
	}
}

// TestExampleStoreSectionParses uncomments the example config's store
// section and parses it, so the keys it documents are the real ones.
func TestExampleStoreSectionParses(t *testing.T) {
	_, section, ok := strings.Cut(exampleConfig, "\n# store:\n")
	require.True(t, ok, "example config has no commented store section")
	var b strings.Builder
	b.WriteString("store:\n")
	for _, line := range strings.Split(section, "\n") {
		rest, ok := strings.CutPrefix(line, "# ")
		if !ok || strings.HasPrefix(strings.TrimSpace(rest), "#") {
			continue // a continued comment
		}
		b.WriteString(rest + "\n")
	}
	cfg, err := ParseConfig(strings.NewReader(b.String()))
	require.NoErrorf(t, err, "example store section:\n%s", b.String())
	r := cfg.Store.Redis
	assert.Falsef(t, r == nil || !r.sharedCache() || r.hotTTL() != 2*time.Second || r.lease() != 10*time.Second || r.timeout() != 500*time.Millisecond, "example store section parsed as %+v", r)
}
