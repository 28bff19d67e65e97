package main

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestParseConfigErrorsNameFieldAndLine(t *testing.T) {
	const team = `teams:
  - name: lab
    keys: ["sha256:` + "aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa" + `"]
`
	tests := []struct {
		name     string
		yaml     string
		wantLine int
		wantText string
	}{
		{"unknown key", "listen: 127.0.0.1:1\nlisten_port: 3\n", 2, "listen_port"},
		{"clear-text key", "teams:\n  - name: lab\n    keys: [\"hunter2\"]\n", 3, "sha256"},
		{"short hash", "teams:\n  - name: lab\n    keys: [\"sha256:abcd\"]\n", 3, "64 hex"},
		{"team without keys", "teams:\n  - name: lab\n", 2, "at least one key"},
		{"duplicate team", team + "  - name: lab\n    keys: [\"sha256:" + strings.Repeat("b", 64) + "\"]\n", 4, "duplicate team"},
		{"bad duration", "cache:\n  ttl: soon\n", 2, "duration"},
		{"negative ttl", "cache:\n  ttl: -5m\n", 2, "ttl"},
		{"bad size", "cache:\n  max_bytes: lots\n", 2, "size"},
		{"upstream without url", "upstreams:\n  - name: a\n", 2, "url"},
		{"upstream bad scheme", "upstreams:\n  - url: ftp://x\n", 2, "http"},
		{"log format", "log:\n  format: xml\n", 2, "format"},
		{"not yaml", "teams: [\n", 0, "YAML"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(tt.yaml))
			require.Error(t, err, "got no error")
			assert.Contains(t, err.Error(), tt.wantText, "error %q does not mention %q", err, tt.wantText)
			assert.Falsef(t, tt.wantLine > 0 && !strings.Contains(err.Error(), "line "+strconv.Itoa(tt.wantLine)), "error %q does not name line %d", err, tt.wantLine)
		})
	}
}

func TestParseConfigValues(t *testing.T) {
	cfg, err := ParseConfig(strings.NewReader(`
listen: 127.0.0.1:9000
cache:
  ttl: 36h
  max_bytes: 512MiB
  hot_bytes: 1GB
server:
  max_body_bytes: 1048576
`))
	require.NoError(t, err)
	assert.Falsef(t, cfg.Listen != "127.0.0.1:9000" || time.Duration(cfg.Cache.TTL) != 36*time.Hour || cfg.Cache.MaxBytes != 512<<20 || cfg.Cache.HotBytes != 1e9 || cfg.Server.MaxBodyBytes != 1<<20, "parsed %+v", cfg)
	assert.Equal(t, DefaultConfig().Data, cfg.Data, "data %q, want the default kept", cfg.Data)
	var ce *ConfigError
	_, err = ParseConfig(strings.NewReader("server:\n  max_body_bytes: 0\n"))
	assert.Falsef(t, !errors.As(err, &ce) || ce.Field != "server.max_body_bytes", "got %v, want a ConfigError on server.max_body_bytes", err)
}

func TestKeysNewPrintsAKeyThatMatchesItsHash(t *testing.T) {
	cmd := newRootCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetArgs([]string{"keys", "new", "--team", "lab"})
	require.NoError(t, cmd.Execute())
	lines := strings.Split(out.String(), "\n")
	key := strings.TrimSpace(lines[1])
	var stored string
	for _, l := range lines {
		if v, ok := strings.CutPrefix(strings.TrimSpace(l), "keys: ["); ok {
			stored = strings.Trim(strings.TrimSuffix(v, "]"), `"`)
		}
	}
	sum := sha256.Sum256([]byte(key))
	assert.Equal(t, "sha256:"+hex.EncodeToString(sum[:]), stored, "stored form %q does not hash key %q", stored, key)
	_, err := parseKeyHash(stored)
	assert.NoError(t, err, "printed line does not parse: %v", err)
}

// TestConfigErrorsNameThePathAndSuggest: a misspelt key or a value of the
// wrong kind is named by its YAML path, with the nearest known key
// suggested, in words a person acts on (no Go type names).
func TestConfigErrorsNameThePathAndSuggest(t *testing.T) {
	const key = `["sha256:aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa"]`
	cases := []struct {
		name, yaml, want string
		line             int
	}{
		{"misspelt upstream key", "upstreams:\n  - urll: http://x\n", `upstreams[0].urll: unknown key; did you mean "url"?`, 2},
		{"misspelt nested key", "upstreams:\n  - url: http://x\n    breaker: {open_fro: 5s}\n", `upstreams[0].breaker.open_fro: unknown key; did you mean "open_for"?`, 3},
		{"misspelt top-level key", "chache:\n  ttl: 5m\n", `chache: unknown key; did you mean "cache"?`, 1},
		{"misspelt price key", "prices:\n  m: {inptu: 1, output: 1}\n", `prices.m.inptu: unknown key; did you mean "input"?`, 2},
		{"misspelt redis key", "store:\n  redis: {adrs: [x]}\n", `store.redis.adrs: unknown key; did you mean "addrs"?`, 2},
		{"nothing near", "cache:\n  zebra: 1\n", `cache.zebra: unknown key; known keys: ttl, max_bytes, hot_bytes`, 2},
		{"a map for a list", "upstreams: {url: x}\n", "upstreams: want a list (- item lines or [a, b]), got a mapping", 1},
		{"a string for a list", "teams:\n  - name: lab\n    keys: \"sha256:x\"\n", `teams[0].keys: want a list (- item lines or [a, b]), got a string`, 3},
		{"text for a number", "server:\n  max_prompts: many\n", `server.max_prompts: want a whole number, got "many"`, 2},
		{"bad duration", "budget:\n  max_wait: 5\n", `budget.max_wait: "5" is not a duration like 90s or 12h`, 2},
		{"bad size", "cache:\n  max_bytes: lots\n", `cache.max_bytes: "lots" is not a size`, 2},
		{"text for a bool", "cache:\n  sampled: sometimes\n", `cache.sampled: want true or false, got "sometimes"`, 2},
		{"bad key_budgets entry", "teams:\n  - name: lab\n    keys: " + key + "\n    key_budgets: {abc: {usd: 1, pre: day}}\n", `teams[0].key_budgets.abc.pre: unknown key; did you mean "per"?`, 4},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			_, err := ParseConfig(strings.NewReader(c.yaml))
			require.Error(t, err, "got no error")
			assert.Contains(t, err.Error(), c.want, "error %q\n  does not say %q", err, c.want)
			assert.Contains(t, err.Error(), "line "+strconv.Itoa(c.line), "error %q does not name line %d", err, c.line)
			for _, internal := range []string{"main.", "!!", "unmarshal", "[]string", "yaml:"} {
				assert.Falsef(t, strings.Contains(err.Error(), internal), "error %q shows %q", err, internal)
			}
		})
	}
}
