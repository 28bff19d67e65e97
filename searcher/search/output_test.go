package search

import (
	"bytes"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

func TestPromptText(t *testing.T) {
	tests := []struct {
		pieces []string
		want   string
	}{
		{nil, ""},
		{[]string{" Once", " upon"}, "Once upon"},
		{[]string{"T", " T"}, "T T"},
	}
	for _, tt := range tests {
		got := PromptText(tt.pieces)
		assert.Equal(t, tt.want, got, "PromptText(%q) = %q, want %q", tt.pieces, got, tt.want)
	}
}

func TestHistoryAndResultsAreDeterministic(t *testing.T) {
	r := Results{Task: "orchard", Seed: 3, Steps: 2,
		Ranking: []Contender{{Method: "rl", Prompt: "the big", TrainAcc: 0.5, DevAcc: 0.25, TestAcc: -1, Calls: 8,
			SearchCalls: 3, SearchSpendUSD: 0.0015, EvalCalls: 2, EvalSpendUSD: 0.00025}},
		History: []Point{{Step: 1, MeanReward: 1.5, TrainAcc: 0.5, DevAcc: -1}, {Step: 2, MeanReward: -2, TrainAcc: 0.25, DevAcc: 0.75, Prompt: "the big"}}}
	var h bytes.Buffer
	require.NoError(t, WriteHistory(&h, r.History))
	want := "step,mean_reward,train_accuracy,dev_accuracy,loss,greedy_prompt\n1,1.5,0.5,,0,\n2,-2,0.25,0.75,0,the big\n"
	assert.Equal(t, want, h.String(), "history:\n%s\nwant\n%s", h.String(), want)
	var a, b bytes.Buffer
	require.NoError(t, WriteResults(&a, r))
	r.Spending.Calls = 99 // run figures are not part of the results
	require.NoError(t, WriteResults(&b, r))
	assert.Falsef(t, a.String() != b.String() || strings.Contains(a.String(), "99"), "results depend on run figures:\n%s", b.String())
	// The row's calls and spend are its search's and its evaluation's
	// added up: 3 + 2 calls, 0.0015 + 0.00025 USD (made-up amounts).
	tab := Table(r)
	for _, want := range []string{`"the big"`, "25.0%", "CALLS", "SPENT USD", " 5 ", "0.001750"} {
		assert.Contains(t, tab, want, "table lacks %q:\n%s", want, tab)
	}
	for _, want := range []string{`"search_calls": 3`, `"search_spend_usd": 0.0015`, `"eval_calls": 2`, `"eval_spend_usd": 0.00025`} {
		assert.Contains(t, a.String(), want, "results.json lacks %s:\n%s", want, a.String())
	}
}
