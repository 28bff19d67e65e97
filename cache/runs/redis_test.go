package runs_test

import (
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/internal/redistest"
)

// TestRedisCorruptValues damages a run's hashes in Redis: reads fail with
// ErrCorrupt, never panic, and never return wrong bytes.
func TestRedisCorruptValues(t *testing.T) {
	t.Parallel()
	c := redistest.Start(t).Client(t)
	ctx := context.Background()
	calls := mixedCalls(6)
	tests := []struct {
		name   string
		suffix string // of the damaged hash's key
		damage func(string) string
	}{
		{"record truncated", "e", func(v string) string { return v[:len(v)/2] }},
		{"record version", "e", func(v string) string { return "\x09" + v[1:] }},
		{"record occurrence", "e", func(v string) string { b := []byte(v); b[16] ^= 1; return string(b) }},
		{"body flipped", "b", func(v string) string { return v + "!" }},
		{"index", "x", func(string) string { return "99" }},
	}
	for i, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			prefix := "c" + string(rune('a'+i))
			j := runs.NewRedis(c, runs.RedisOptions{Prefix: prefix})
			recordAll(t, j, "lab", "r", calls)
			key := prefix + ":run:{lab/r}:" + tc.suffix
			all, err := c.HGetAll(ctx, key).Result()
			require.NoError(t, err, "HGETALL %s", key)
			require.NotEmpty(t, all, "HGETALL %s", key)
			for f, v := range all {
				require.NoError(t, c.HSet(ctx, key, f, tc.damage(v)).Err())
			}
			for _, call := range calls {
				_, a, err := j.Lookup(ctx, "lab", "r", call.key, 1)
				if err == nil {
					require.Equal(t, string(call.answer.Body), string(a.Body), "Lookup returned wrong bytes after damage")
				}
				assert.ErrorIs(t, err, runs.ErrCorrupt, "Lookup")
			}
			if tc.suffix != "x" { // Export does not read the index
				assert.ErrorIs(t, j.Export(ctx, "lab", "r", discard{}), runs.ErrCorrupt, "Export: got")
			}
		})
	}
	// A damaged summary.
	j := runs.NewRedis(c, runs.RedisOptions{Prefix: "cs"})
	recordAll(t, j, "lab", "r", calls)
	require.NoError(t, c.HSet(ctx, "cs:run:{lab/r}:m", "cost", "lots").Err())
	_, err := j.Summary(ctx, "lab", "r")
	assert.ErrorIs(t, err, runs.ErrCorrupt, "Summary: got")
	_, err = j.List(ctx, "lab")
	assert.ErrorIs(t, err, runs.ErrCorrupt, "List: got")
}

type discard struct{}

func (discard) Write(p []byte) (int, error) { return len(p), nil }
