package search

import (
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestReadStateRefuses(t *testing.T) {
	good := `{"version":3,"task":"orchard","seed":7,"step":3,"random":"AAAA","policy":"AAAA"}`
	_, err := ReadState(strings.NewReader(good), "orchard", 7)
	require.NoError(t, err, "good checkpoint")
	tests := []struct{ name, text string }{
		{"truncated", good[:len(good)/2]},
		{"another version", strings.Replace(good, `"version":3`, `"version":2`, 1)},
		{"another task", strings.Replace(good, `"orchard"`, `"pantry"`, 1)},
		{"another seed", strings.Replace(good, `"seed":7`, `"seed":8`, 1)},
		{"no policy", strings.Replace(good, `,"policy":"AAAA"`, ``, 1)},
		{"negative step", strings.Replace(good, `"step":3`, `"step":-1`, 1)},
		{"unknown field", strings.Replace(good, `{`, `{"colour":"red",`, 1)},
		{"not JSON", "checkpoint"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			_, err := ReadState(strings.NewReader(tt.text), "orchard", 7)
			assert.ErrorIs(t, err, ErrCheckpoint, "ReadState: %v, want ErrCheckpoint", err)
		})
	}
}
