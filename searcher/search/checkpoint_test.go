package search

import (
	"errors"
	"strings"
	"testing"
)

func TestReadStateRefuses(t *testing.T) {
	good := `{"version":3,"task":"orchard","seed":7,"step":3,"random":"AAAA","policy":"AAAA"}`
	if _, err := ReadState(strings.NewReader(good), "orchard", 7); err != nil {
		t.Fatalf("good checkpoint: %v", err)
	}
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
			if _, err := ReadState(strings.NewReader(tt.text), "orchard", 7); !errors.Is(err, ErrCheckpoint) {
				t.Errorf("ReadState: %v, want ErrCheckpoint", err)
			}
		})
	}
}
