package cache_test

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache"
	"github.com/stintlab/stint/cache/canon"
)

func TestKeyEachPartMatters(t *testing.T) {
	base := cache.KeyParts{Namespace: "team-heron", Upstream: "https://llm.example.test/v1", Endpoint: "/v1/completions", Model: "tern-7"}
	body := []byte(`{"max_tokens":16,"prompt":"a","temperature":0}`)
	baseKey := cache.Key(base, body)

	tests := []struct {
		name  string
		parts cache.KeyParts
		body  string
	}{
		{"namespace", cache.KeyParts{Namespace: "team-egret", Upstream: base.Upstream, Endpoint: base.Endpoint, Model: base.Model}, string(body)},
		{"upstream", cache.KeyParts{Namespace: base.Namespace, Upstream: "https://other.example.test/v1", Endpoint: base.Endpoint, Model: base.Model}, string(body)},
		{"endpoint", cache.KeyParts{Namespace: base.Namespace, Upstream: base.Upstream, Endpoint: "/v1/chat/completions", Model: base.Model}, string(body)},
		{"model", cache.KeyParts{Namespace: base.Namespace, Upstream: base.Upstream, Endpoint: base.Endpoint, Model: "tern-8"}, string(body)},
		{"body", base, `{"max_tokens":17,"prompt":"a","temperature":0}`},
		{"empty body", base, ``},
		// Length prefixes: moving a byte from one field to the next changes the key.
		{"namespace/upstream boundary", cache.KeyParts{Namespace: base.Namespace + "h", Upstream: base.Upstream[1:], Endpoint: base.Endpoint, Model: base.Model}, string(body)},
		{"model/body boundary", cache.KeyParts{Namespace: base.Namespace, Upstream: base.Upstream, Endpoint: base.Endpoint, Model: base.Model + "{"}, string(body[1:])},
		{"endpoint/model swap", cache.KeyParts{Namespace: base.Namespace, Upstream: base.Upstream, Endpoint: base.Model, Model: base.Endpoint}, string(body)},
	}
	seen := map[string]string{baseKey: "base"}
	for _, tc := range tests {
		got := cache.Key(tc.parts, []byte(tc.body))
		assert.NotContains(t, seen, got, "%s: key equals the key of %s", tc.name, seen[got])
		seen[got] = tc.name
	}
	assert.Equal(t, baseKey, cache.Key(base, body), "Key is deterministic")
	assert.Regexp(t, `^[0-9a-f]{64}$`, baseKey, "Key: 64 lowercase hex digits")
}

// TestKeyEncoding recomputes a key from the documented encoding with a
// separately written encoder, so the format cannot drift unnoticed.
func TestKeyEncoding(t *testing.T) {
	parts := cache.KeyParts{Namespace: "ns", Upstream: "u", Endpoint: "/v1/completions", Model: "m"}
	body := []byte(`{"prompt":"x"}`)
	var in []byte
	in = append(in, "stint cache key v1\x00"...)
	for _, f := range []string{parts.Namespace, parts.Upstream, parts.Endpoint, parts.Model, string(body)} {
		in = binary.BigEndian.AppendUint64(in, uint64(len(f)))
		in = append(in, f...)
	}
	sum := sha256.Sum256(in)
	assert.Equal(t, hex.EncodeToString(sum[:]), cache.Key(parts, body), "Key")
}

// TestKeyOfEquivalentBodies: bodies that differ only in member order, number
// spelling and whitespace canonicalize, and so key, the same.
func TestKeyOfEquivalentBodies(t *testing.T) {
	parts := cache.KeyParts{Namespace: "team-heron", Upstream: "u", Endpoint: "/v1/completions", Model: "tern-7"}
	a, err := canon.Transform([]byte(`{"temperature": 0.0, "prompt": "hi", "max_tokens": 1E1}`))
	require.NoError(t, err)
	b, err := canon.Transform([]byte(`{"max_tokens":10,"prompt":"h\u0069","temperature":-0}`))
	require.NoError(t, err)
	assert.Equal(t, cache.Key(parts, a), cache.Key(parts, b), "keys of equivalent bodies %s and %s", a, b)
}

// TestKeyLargeInput covers the streaming path for inputs past the stack
// buffer: it must give the same digest as the documented encoding.
func TestKeyLargeInput(t *testing.T) {
	parts := cache.KeyParts{Namespace: "ns", Upstream: "u", Endpoint: "/v1/completions", Model: "m"}
	for _, n := range []int{1900, 1950, 1960, 1970, 2048, 10000} {
		body := make([]byte, n)
		for i := range body {
			body[i] = byte('a' + i%26)
		}
		var in []byte
		in = append(in, "stint cache key v1\x00"...)
		for _, f := range []string{parts.Namespace, parts.Upstream, parts.Endpoint, parts.Model, string(body)} {
			in = binary.BigEndian.AppendUint64(in, uint64(len(f)))
			in = append(in, f...)
		}
		sum := sha256.Sum256(in)
		assert.Equal(t, hex.EncodeToString(sum[:]), cache.Key(parts, body), "Key of a body of %d bytes", n)
	}
}
