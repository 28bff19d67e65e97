package search

import (
	"bytes"
	"fmt"
	"html"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
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
	require.NoError(t, WritePlot(&b, r, SVG))
	svg := html.UnescapeString(b.String())
	want := []string{"orchard: prompt search (seed 3)", "dev accuracy: the search's greedy prompt and the baselines", "rl search (greedy prompt)",
		`empty ""`, `manual "Pick the fruit."`, `manual "Orchard"`, `random "crate gate"`, `best-of-n "crate pear"`, `halving "gate pear"`, `rl (chosen) "ripe pears"`}
	for _, w := range want {
		assert.Contains(t, svg, w, "the SVG lacks %q", w)
	}
	assert.False(t, strings.Contains(svg, "ripe apples"), "the SVG shows rl-greedy, which has no line of its own (the curve is the greedy prompt's)")
	assert.Contains(t, b.String(), "<svg", "not an SVG document: %.80s", b.String())
}

// TestEveryLineHasItsOwnLook: the first eight lines of the learning curve
// (the search's curve and up to seven contenders) differ pairwise in
// colour, in dash and in glyph, the colours being the Okabe–Ito palette's
// (source: Okabe and Ito 2008, "Color Universal Design", whose hex values
// are #000000 #E69F00 #56B4E9 #009E73 #F0E442 #0072B2 #D55E00 #CC79A7); past
// eight, no two of the first 64 lines share both colour and dash. The SVG
// of a two-manual-prompt result draws the two manual lines apart.
func TestEveryLineHasItsOwnLook(t *testing.T) {
	want := []string{"000000", "e69f00", "56b4e9", "009e73", "f0e442", "0072b2", "d55e00", "cc79a7"}
	for i := range 8 {
		a := styleOf(i)
		assert.Equal(t, want[i], fmt.Sprintf("%02x%02x%02x", a.Color.R, a.Color.G, a.Color.B), "line %d's colour", i)
		for j := range i {
			b := styleOf(j)
			assert.NotEqual(t, a.Color, b.Color, "lines %d and %d share a colour", i, j)
			assert.NotEqual(t, fmt.Sprint(a.Dashes), fmt.Sprint(b.Dashes), "lines %d and %d share a dash", i, j)
			assert.NotEqual(t, fmt.Sprintf("%T", a.Glyph), fmt.Sprintf("%T", b.Glyph), "lines %d and %d share a glyph", i, j)
		}
	}
	seen := map[string]int{}
	for i := range 64 {
		st := styleOf(i)
		k := fmt.Sprint(st.Color, st.Dashes)
		j, ok := seen[k]
		assert.Falsef(t, ok, "lines %d and %d share colour and dash", j, i)
		seen[k] = i
	}

	r := Results{Task: "orchard", Seed: 3,
		History: []Point{{Step: 1, MeanReward: 0.5, DevAcc: 0.5, Prompt: "ripe"}, {Step: 2, MeanReward: 1, DevAcc: 0.75, Prompt: "ripe pears"}},
		Ranking: []Contender{
			{Method: "rl", Prompt: "ripe pears", DevAcc: 0.75},
			{Method: "manual", Prompt: "Pick the fruit.", DevAcc: 0.55},
			{Method: "manual", Prompt: "Orchard", DevAcc: 0.55},
		}}
	var b bytes.Buffer
	require.NoError(t, WritePlot(&b, r, SVG))
	svg := strings.ToLower(b.String())
	for _, i := range []int{1, 2, 3} {
		st := styleOf(i)
		stroke := fmt.Sprintf("stroke:#%02x%02x%02x;", st.Color.R, st.Color.G, st.Color.B)
		assert.True(t, strings.Contains(svg, stroke), "line %d is not drawn with %q", i, stroke)
		dash := fmt.Sprintf("stroke-dasharray:%v,%v", st.Dashes[0].Points(), st.Dashes[1].Points())
		assert.True(t, strings.Contains(svg, dash), "line %d is not drawn with %q", i, dash)
	}
}
