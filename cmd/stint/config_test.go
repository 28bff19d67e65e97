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
			if err == nil {
				t.Fatal("got no error")
			}
			if !strings.Contains(err.Error(), tt.wantText) {
				t.Errorf("error %q does not mention %q", err, tt.wantText)
			}
			if tt.wantLine > 0 && !strings.Contains(err.Error(), "line "+strconv.Itoa(tt.wantLine)) {
				t.Errorf("error %q does not name line %d", err, tt.wantLine)
			}
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
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Listen != "127.0.0.1:9000" || time.Duration(cfg.Cache.TTL) != 36*time.Hour || cfg.Cache.MaxBytes != 512<<20 || cfg.Cache.HotBytes != 1e9 || cfg.Server.MaxBodyBytes != 1<<20 {
		t.Errorf("parsed %+v", cfg)
	}
	if cfg.Data != DefaultConfig().Data {
		t.Errorf("data %q, want the default kept", cfg.Data)
	}
	var ce *ConfigError
	_, err = ParseConfig(strings.NewReader("server:\n  max_body_bytes: 0\n"))
	if !errors.As(err, &ce) || ce.Field != "server.max_body_bytes" {
		t.Errorf("got %v, want a ConfigError on server.max_body_bytes", err)
	}
}

func TestKeysNewPrintsAKeyThatMatchesItsHash(t *testing.T) {
	cmd := newRootCmd()
	var out bytes.Buffer
	cmd.SetOut(&out)
	cmd.SetArgs([]string{"keys", "new", "--team", "lab"})
	if err := cmd.Execute(); err != nil {
		t.Fatal(err)
	}
	lines := strings.Split(out.String(), "\n")
	key := strings.TrimSpace(lines[1])
	stored := strings.Trim(strings.TrimSpace(strings.TrimPrefix(strings.TrimSpace(lines[3]), "- ")), `"`)
	sum := sha256.Sum256([]byte(key))
	if stored != "sha256:"+hex.EncodeToString(sum[:]) {
		t.Errorf("stored form %q does not hash key %q", stored, key)
	}
	if _, err := parseKeyHash(stored); err != nil {
		t.Errorf("printed line does not parse: %v", err)
	}
}
