package search

import (
	"errors"
	"path/filepath"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

func TestPlanForTheExampleTask(t *testing.T) {
	tk, err := task.Parse([]byte(task.ExampleFile), filepath.Join("..", "..", "testdata", "search"), nil)
	require.NoError(t, err)
	p := PlanFor(tk, 0)
	// Hand-worked from the example: 90 steps × 16 prompts × 8 examples =
	// 11,520 judgements; dev (20 sentences) every 9 steps is 10 × 20 = 200;
	// the choice keeps a quarter of the whole, a third of the rest:
	// round(11,720 / 3) = 3,907; so 15,627 for the search and as many for
	// each of the two baselines (best-of-n, halving); the 7 contenders (rl,
	// rl-greedy, empty, 2 manual, 2 baselines) on 40 + 20 + 40 sentences
	// are 700.
	b := BudgetFor(tk, 0)
	assert.Equal(t, Budget{Steps: 11520, Curve: 200, EvalEvery: 9, Choice: 3907}, b)
	assert.Equal(t, Plan{Search: 15627, Baselines: 31254, Evaluation: 700, TokensPerJudgement: p.TokensPerJudgement}, p)
	assert.Equal(t, 47581, p.Judgements())
	assert.Falsef(t, p.TokensPerJudgement <= 0, "tokens per judgement %d", p.TokensPerJudgement)
	// 47,581 scorings × T tokens at 1 USD per million in, plus one output
	// token each at 2 USD per million.
	want := (47581*float64(p.TokensPerJudgement)*1 + 47581*2) / 1e6
	got := p.Cost(scorer.Price{InputPerMillion: 1, OutputPerMillion: 2})
	assert.Equal(t, want, got, "cost %v, want %v", got, want)
}

// TestCheckCapRefusals: a search with a spend cap starts only when its
// forecast is priced and under the cap, or when told to (--over-cap), and
// a refusal names what to change. The cases are the whole decision table
// (a cap with no price is refused, a priced forecast under the cap runs,
// one over is refused, --over-cap starts either); the amounts are made up
// to fall either side.
func TestCheckCapRefusals(t *testing.T) {
	tk, err := task.Parse([]byte(task.ExampleFile), filepath.Join("..", "..", "testdata", "search"), nil)
	require.NoError(t, err)
	plan := PlanFor(tk, 0)
	f := func(x float64) *float64 { return &x }
	atTask := plan.Cost(scorer.Price{InputPerMillion: 0.5, OutputPerMillion: 1.5}) // the example's prices
	tests := []struct {
		name       string
		prices     *task.Prices
		override   PriceOverride
		capUSD     float64
		overCap    bool
		want       error    // nil: it starts
		mention    []string // in the error or the note
		notMention []string
	}{
		{"cap, no price", nil, PriceOverride{}, 2.5, false, ErrNoPrice,
			[]string{"prices.input_per_million", "--input-price", "prices.output_per_million", "--output-price", "--over-cap"}, nil},
		{"cap, only the input price", nil, PriceOverride{InputPerMillion: f(1)}, 2.5, false, ErrNoPrice,
			[]string{"prices.output_per_million", "--output-price"}, []string{"prices.input_per_million"}},
		{"cap, no price, over-cap", nil, PriceOverride{}, 2.5, true, nil, []string{"proxy reports"}, nil},
		{"task price under the cap", tk.Prices, PriceOverride{}, 2 * atTask, false, nil, nil, nil},
		{"task price over the cap", tk.Prices, PriceOverride{}, atTask / 2, false, ErrOverCap, []string{"spend_cap_usd", "--over-cap"}, nil},
		{"flags over the task's prices push it over", tk.Prices, PriceOverride{InputPerMillion: f(100), OutputPerMillion: f(100)}, 2 * atTask, false, ErrOverCap, nil, nil},
		{"flags alone under the cap", nil, PriceOverride{InputPerMillion: f(0.5), OutputPerMillion: f(1.5)}, 2 * atTask, false, nil, nil, nil},
		{"over the cap, over-cap", tk.Prices, PriceOverride{}, atTask / 2, true, nil, []string{"proxy reports"}, nil},
		{"no cap, no price", nil, PriceOverride{}, 0, false, nil, nil, nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			p := PricingFor(tt.prices, tt.override)
			forecast := 0.0
			if p.Known() {
				forecast = plan.Cost(p.Price)
			}
			note, err := CheckCap(tt.capUSD, forecast, p, tt.overCap)
			require.Falsef(t, !errors.Is(err, tt.want) || (tt.want == nil) != (err == nil), "CheckCap: %v, want %v", err, tt.want)
			text := note
			if err != nil {
				text = err.Error()
			}
			for _, m := range tt.mention {
				assert.Contains(t, text, m, "%q does not name %q", text, m)
			}
			for _, m := range tt.notMention {
				assert.Falsef(t, strings.Contains(text, m), "%q names %q, which is set", text, m)
			}
		})
	}
}
