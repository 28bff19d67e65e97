package proxy

import (
	"bytes"
	"context"
	"log/slog"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/wire"
)

// slogLine is the line slog's JSON handler writes for ll: the reference the
// hand-written request line must match byte for byte.
func slogLine(t testing.TB, now time.Time, ll *logLine, d time.Duration) []byte {
	t.Helper()
	var buf bytes.Buffer
	h := slog.NewJSONHandler(&buf, nil)
	r := slog.NewRecord(now, slog.LevelInfo, "request", 0)
	r.AddAttrs(
		slog.String("team", ll.team), slog.String("endpoint", string(ll.endpoint)), slog.String("model", ll.model),
		slog.String("cache", ll.outcome), slog.Int("status", ll.status), slog.Int("prompts", ll.prompts), slog.Int("cached_prompts", ll.hits),
		slog.Int("prompt_tokens", ll.usage.PromptTokens), slog.Int("completion_tokens", ll.usage.CompletionTokens),
		slog.Int64("upstream_us", ll.upstream.Microseconds()), slog.Int64("duration_us", d.Microseconds()),
	)
	if ll.promptText != "" {
		r.AddAttrs(slog.String("prompt", ll.promptText))
	}
	require.NoError(t, h.Handle(context.Background(), r))
	return buf.Bytes()
}

func TestRequestLineMatchesSlog(t *testing.T) {
	now := time.Date(2026, 3, 14, 9, 26, 53, 589793000, time.UTC)
	tests := []struct {
		name string
		ll   logLine
		d    time.Duration
	}{
		{"hit", logLine{team: "lab", model: "quill-small", outcome: OutcomeHit, endpoint: endpointCompletions, status: 200, prompts: 1, hits: 1, usage: wire.Usage{PromptTokens: 9, CompletionTokens: 8}}, 41 * time.Microsecond},
		{"miss with upstream time", logLine{team: "default", model: "m", outcome: OutcomeMiss, endpoint: endpointChat, status: 200, prompts: 1, upstream: 1234567 * time.Microsecond, usage: wire.Usage{PromptTokens: 100, CompletionTokens: 20}}, 2 * time.Second},
		{"error without outcome", logLine{team: "", model: "", endpoint: endpointCompletions, status: 400}, 0},
		{"quotes and controls", logLine{team: `a"b\c`, model: "tab\there\nnew\x01\x1f", outcome: OutcomeBypass, status: 200}, time.Millisecond},
		{"unicode and html", logLine{team: "équipe", model: "<m&o>", promptText: "Lily 🌼 line\u2028sep\u2029", status: 200}, time.Millisecond},
		{"invalid utf-8", logLine{team: "x\xffy", model: "\xe2\x82", promptText: "ok\xc0\xafend", status: 200}, time.Millisecond},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			want := slogLine(t, now, &tc.ll, tc.d)
			got := appendRequestLine(nil, now, &tc.ll, tc.d)
			assert.Equal(t, string(want), string(got), "line differs from slog's JSON handler")
		})
	}
}

// FuzzRequestLine checks the hand-written line against slog's JSON handler
// for arbitrary field text.
func FuzzRequestLine(f *testing.F) {
	for _, s := range []string{"", "lab", `"\`, "\x00\x7f", "\u2028", "\xff", "é🌼"} {
		f.Add(s, s)
	}
	now := time.Date(2026, 1, 2, 3, 4, 5, 6, time.UTC)
	f.Fuzz(func(t *testing.T, team, prompt string) {
		ll := logLine{team: team, model: team, outcome: OutcomeHit, endpoint: endpointCompletions, status: 200, promptText: prompt}
		want := slogLine(t, now, &ll, time.Microsecond)
		got := appendRequestLine(nil, now, &ll, time.Microsecond)
		assert.True(t, bytes.Equal(got, want), "line differs from slog's JSON handler\n got: %q\nwant: %q", got, want)
	})
}
