package search

import (
	"errors"
	"fmt"
	"strings"
	"testing"
)

func TestReadStateRefuses(t *testing.T) {
	good := `{"version":2,"task":"orchard","seed":7,"step":3,"random":"AAAA","policy":"AAAA"}`
	if _, err := ReadState(strings.NewReader(good), "orchard", 7); err != nil {
		t.Fatalf("good checkpoint: %v", err)
	}
	tests := []struct{ name, text string }{
		{"truncated", good[:len(good)/2]},
		{"another version", strings.Replace(good, `"version":2`, `"version":1`, 1)},
		{"another task", strings.Replace(good, `"orchard"`, `"pantry"`, 1)},
		{"another seed", strings.Replace(good, `"seed":7`, `"seed":8`, 1)},
		{"no policy", strings.Replace(good, `,"policy":"AAAA"`, ``, 1)},
		{"step zero", strings.Replace(good, `"step":3`, `"step":0`, 1)},
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

func TestNoteBestKeepsTheFirstHighestMean(t *testing.T) {
	tests := []struct {
		name  string
		steps [][][]float64 // per step, per prompt, the raw rewards
		want  string
	}{
		{"one step", [][][]float64{{{1, 2}, {3, 4}, {0, 0}}}, "p0-1"},
		{"ties keep the first", [][][]float64{{{2, 2}, {1, 3}}}, "p0-0"},
		{"a later step wins", [][][]float64{{{1, 1}, {0, 0}}, {{0, 0}, {5, 5}}}, "p1-1"},
		{"all negative", [][][]float64{{{-3, -3}, {-1, -2}}}, "p0-1"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			var r runner
			for s, raw := range tt.steps {
				texts := make([]string, len(raw))
				for i := range texts {
					texts[i] = fmt.Sprintf("p%d-%d", s, i)
				}
				r.noteBest(texts, raw)
			}
			if r.bestText != tt.want {
				t.Errorf("best = %q, want %q", r.bestText, tt.want)
			}
		})
	}
}

// TestBestByDev: the best greedy prompt so far is the one with the highest
// dev accuracy among the evaluated steps, the earliest on ties; steps not
// evaluated (dev −1) never count. Hand-made histories.
func TestBestByDev(t *testing.T) {
	pt := func(step int, dev float64, prompt string) Point {
		return Point{Step: step, DevAcc: dev, Prompt: prompt}
	}
	tests := []struct {
		name string
		h    []Point
		want DevBest
	}{
		{"none evaluated", []Point{pt(1, -1, ""), pt(2, -1, "")}, DevBest{DevAcc: -1}},
		{"a later one is better", []Point{pt(2, 0.5, "a"), pt(3, -1, ""), pt(4, 0.75, "b")}, DevBest{"b", 4, 0.75}},
		{"the latest is worse", []Point{pt(2, 0.75, "a"), pt(4, 0.5, "b")}, DevBest{"a", 2, 0.75}},
		{"ties keep the earliest", []Point{pt(2, 0.5, "a"), pt(4, 0.5, "b")}, DevBest{"a", 2, 0.5}},
		{"zero accuracy counts", []Point{pt(1, 0, "a")}, DevBest{"a", 1, 0}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if got := BestByDev(tt.h); got != tt.want {
				t.Errorf("BestByDev = %+v, want %+v", got, tt.want)
			}
		})
	}
}
