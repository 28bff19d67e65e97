package budget_test

import (
	"errors"
	"math"
	"strings"
	"testing"

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
				if err != nil {
					t.Errorf("Validate() = %v, want nil", err)
				}
				return
			}
			if err == nil || !strings.Contains(err.Error(), tt.want) || !errors.Is(err, budget.ErrBadPrice) {
				t.Errorf("Validate() = %v, want an ErrBadPrice containing %q", err, tt.want)
			}
		})
	}
}

func TestRateLookup(t *testing.T) {
	table := budget.PriceTable{Models: map[string]budget.Price{"demo-model": {Input: 0.5, Output: 1.5}}}
	r, err := table.Rate("demo-model")
	if want := (budget.Rate{Input: 500_000_000, CachedInput: 500_000_000, Output: 1_500_000_000}); err != nil || r != want {
		t.Errorf("Rate(demo-model) = %+v, %v; want %+v (cached input at the input price)", r, err, want)
	}
	_, err = table.Rate("other-model")
	if !errors.Is(err, budget.ErrUnknownModel) || !strings.Contains(err.Error(), `"other-model"`) {
		t.Errorf("Rate(other-model) error = %v, want ErrUnknownModel naming the model", err)
	}
	table.Default = &budget.Price{Input: 2, Output: 8}
	if r, err := table.Rate("other-model"); err != nil || r.Output != 8*budget.NanosPerUSD {
		t.Errorf("Rate with a default = %+v, %v; want the default price", r, err)
	}
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
			if (err != nil) != tt.wantErr || got != tt.want {
				t.Errorf("Cost(%+v) = %d, %v; want %d, error %v", tt.usage, got, err, tt.want, tt.wantErr)
			}
			if err != nil && !errors.Is(err, budget.ErrBadAmount) {
				t.Errorf("error %v does not wrap ErrBadAmount", err)
			}
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
		if err != nil {
			t.Fatal(err)
		}
		sum += c
		fsum += c.USD()
	}
	if sum != 1000*budget.NanosPerUSD {
		t.Errorf("sum = %s, want exactly 1000.00", sum)
	}
	t.Logf("the same sum in float64 dollars: %.12f", fsum)
}
