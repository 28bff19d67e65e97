package search

import (
	"bytes"
	"html"
	"strings"
	"testing"
)

// TestPlotShowsTheBaselinesAndBothPanels: the SVG learning curve carries
// both panels' titles, the search's legend entry and one legend entry per
// baseline (empty, each manual prompt, random, best-of-n, halving) and the
// search's chosen prompt, each naming its prompt; rl-greedy is in the
// table, not on the plot. Source: WritePlot's own
// description (baselines are drawn as lines), made-up
// results.
func TestPlotShowsTheBaselinesAndBothPanels(t *testing.T) {
	r := Results{Task: "orchard", Seed: 3,
		History: []Point{{Step: 1, MeanReward: 0.5, DevAcc: -1}, {Step: 2, MeanReward: 1, DevAcc: 0.75, Prompt: "ripe pears"}},
		Ranking: []Contender{
			{Method: "rl", Prompt: "ripe pears", DevAcc: 0.75},
			{Method: "rl-greedy", Prompt: "ripe apples", DevAcc: 0.7},
			{Method: "empty", Prompt: "", DevAcc: 0.5},
			{Method: "manual", Prompt: "Pick the fruit.", DevAcc: 0.55},
			{Method: "manual", Prompt: "Orchard", DevAcc: 0.6},
			{Method: "random", Prompt: "crate gate", DevAcc: 0.65},
			{Method: "best-of-n", Prompt: "crate pear", DevAcc: 0.7},
			{Method: "halving", Prompt: "gate pear", DevAcc: 0.72},
		}}
	var b bytes.Buffer
	if err := WritePlot(&b, r, SVG); err != nil {
		t.Fatal(err)
	}
	svg := html.UnescapeString(b.String())
	want := []string{"orchard: prompt search (seed 3)", "dev accuracy: the search's greedy prompt and the baselines", "rl search (greedy prompt)",
		`empty ""`, `manual "Pick the fruit."`, `manual "Orchard"`, `random "crate gate"`, `best-of-n "crate pear"`, `halving "gate pear"`, `rl (chosen) "ripe pears"`}
	for _, w := range want {
		if !strings.Contains(svg, w) {
			t.Errorf("the SVG lacks %q", w)
		}
	}
	if strings.Contains(svg, "ripe apples") {
		t.Error("the SVG shows rl-greedy, which has no line of its own (the curve is the greedy prompt's)")
	}
	if !strings.Contains(b.String(), "<svg") {
		t.Errorf("not an SVG document: %.80s", b.String())
	}
}
