package budget_test

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/budget"
)

func ptr(f float64) *float64 { return &f }

func TestPriceTableValidate(t *testing.T) {
	tests := []struct {
		name  string
		table budget.PriceTable
		want  string // substring of the error; "" means valid
	}{
		{"good", budget.PriceTable{Models: map[string]budget.Price{"demo-model": {Input: 0.5, Output: 1.5, CachedInput: ptr(0.25)}}}, ""},
		{"free model", budget.PriceTable{Models: map[string]budget.Price{"local": {}}}, ""},
		{"negative input", budget.PriceTable{Models: map[string]budget.Price{"demo-model": {Input: -1, Output: 1}}}, `model "demo-model": budget: bad price: input is -1`},
		{"NaN output", budget.PriceTable{Models: map[string]budget.Price{"demo-model": {Input: 1, Output: math.NaN()}}}, `model "demo-model": budget: bad price: output is NaN`},
		{"negative cached", budget.PriceTable{Models: map[string]budget.Price{"m": {CachedInput: ptr(-0.1)}}}, `model "m": budget: bad price: cached_input is -0.1`},
		{"infinite", budget.PriceTable{Models: map[string]budget.Price{"m": {Input: math.Inf(1)}}}, `model "m": budget: bad price: input is +Inf`},
		{"absurd", budget.PriceTable{Models: map[string]budget.Price{"m": {Output: 2e6}}}, `output is 2e+06 USD per million tokens`},
		{"empty name", budget.PriceTable{Models: map[string]budget.Price{"": {}}}, "empty model name"},
		{"bad default", budget.PriceTable{Default: &budget.Price{Input: -2}}, "default price: budget: bad price: input is -2"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			err := tt.table.Validate()
			if tt.want == "" {
				assert.NoError(t, err, "Validate()")
				return
			}
			require.ErrorIs(t, err, budget.ErrBadPrice, "Validate()")
			assert.Contains(t, err.Error(), tt.want, "Validate()")
		})
	}
}

func TestRateLookup(t *testing.T) {
	table := budget.PriceTable{Models: map[string]budget.Price{"demo-model": {Input: 0.5, Output: 1.5}}}
	r, err := table.Rate("demo-model")
	require.NoError(t, err, "Rate(demo-model)")
	assert.Equal(t, budget.Rate{Input: 500_000_000, CachedInput: 500_000_000, Output: 1_500_000_000}, r, "Rate(demo-model): cached input at the input price")
	_, err = table.Rate("other-model")
	require.ErrorIs(t, err, budget.ErrUnknownModel, "Rate(other-model)")
	assert.Contains(t, err.Error(), `"other-model"`, "the error names the model")
	table.Default = &budget.Price{Input: 2, Output: 8}
	r, err = table.Rate("other-model")
	require.NoError(t, err, "Rate with a default")
	assert.Equal(t, 8*budget.NanosPerUSD, r.Output, "Rate with a default: the default price")
}

func TestCost(t *testing.T) {
	demo := budget.Rate{Input: 500_000_000, CachedInput: 250_000_000, Output: 1_500_000_000} // 0.50 / 0.25 / 1.50 USD per M
	tests := []struct {
		name    string
		rate    budget.Rate
		usage   budget.Usage
		want    budget.Nanos
		wantErr bool
	}{
		// 1000 × 0.50/1e6 USD + 500 × 1.50/1e6 USD = 0.0005 + 0.00075 USD.
		{"plain", demo, budget.Usage{InputTokens: 1000, OutputTokens: 500}, 1_250_000, false},
		// 400 of the 1000 prompt tokens cached: 600×500 + 400×250 + 0 nano-USD.
		{"cached", demo, budget.Usage{InputTokens: 1000, CachedInputTokens: 400}, 400_000, false},
		{"one token", demo, budget.Usage{OutputTokens: 1}, 1500, false},
		// 3 tokens at 0.0000001 USD per M = 0.0003 nano-USD: rounded up to 1.
		{"rounds up", budget.Rate{Input: 100}, budget.Usage{InputTokens: 3}, 1, false},
		{"exact million", budget.Rate{Input: 7}, budget.Usage{InputTokens: 2_000_000}, 14, false},
		{"nothing", demo, budget.Usage{}, 0, false},
		// 1e12 tokens at 1e6 USD per M: 1e12 × 1e15 / 1e6 = 1e21 nano-USD,
		// beyond int64; the 128-bit sum notices instead of wrapping.
		{"overflow", budget.Rate{Output: 1e15}, budget.Usage{OutputTokens: 1e12}, 0, true},
		{"negative tokens", demo, budget.Usage{InputTokens: -1}, 0, true},
		{"cached above input", demo, budget.Usage{InputTokens: 1, CachedInputTokens: 2}, 0, true},
		{"negative rate", budget.Rate{Input: -1}, budget.Usage{InputTokens: 1}, 0, true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := tt.rate.Cost(tt.usage)
			if tt.wantErr {
				assert.ErrorIs(t, err, budget.ErrBadAmount, "Cost(%+v)", tt.usage)
			} else {
				assert.NoError(t, err, "Cost(%+v)", tt.usage)
			}
			assert.Equal(t, tt.want, got, "Cost(%+v)", tt.usage)
		})
	}
}

// TestCostExactSum checks that many small charges sum exactly in Nanos
// where float64 dollars drift: a million charges of 0.1 cent.
func TestCostExactSum(t *testing.T) {
	r := budget.Rate{Input: 1_000_000_000} // 1 USD per M tokens
	var sum budget.Nanos
	var fsum float64
	for range 1_000_000 {
		c, err := r.Cost(budget.Usage{InputTokens: 1000}) // 0.001 USD
		require.NoError(t, err)
		sum += c
		fsum += c.USD()
	}
	assert.Equal(t, 1000*budget.NanosPerUSD, sum, "sum: exactly 1000.00")
	t.Logf("the same sum in float64 dollars: %.12f", fsum)
}
