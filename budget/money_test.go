package budget_test

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"

	"github.com/stintlab/stint/budget"
)

func TestFromUSD(t *testing.T) {
	tests := []struct {
		usd     float64
		want    budget.Nanos
		wantErr bool
	}{
		{25.00, 25_000_000_000, false},
		{0.1, 100_000_000, false},
		{0.000000001, 1, false},
		{0, 0, false},
		{-0.01, 0, true},
		{math.NaN(), 0, true},
		{math.Inf(1), 0, true},
		{1e7, 0, true}, // above MaxNanos (about 9.0e6 USD)
	}
	for _, tt := range tests {
		got, err := budget.FromUSD(tt.usd)
		if tt.wantErr {
			assert.ErrorIs(t, err, budget.ErrBadAmount, "FromUSD(%v)", tt.usd)
		} else {
			assert.NoError(t, err, "FromUSD(%v)", tt.usd)
		}
		assert.Equal(t, tt.want, got, "FromUSD(%v)", tt.usd)
	}
}

func TestNanosString(t *testing.T) {
	tests := []struct {
		n    budget.Nanos
		want string
	}{
		{0, "0.00"},
		{1, "0.000000001"},
		{1_250_000, "0.00125"},
		{25 * budget.NanosPerUSD, "25.00"},
		{-1_500_000_000, "-1.50"},
		{budget.MaxNanos, "9007199.254740991"},
	}
	for _, tt := range tests {
		assert.Equal(t, tt.want, tt.n.String(), "Nanos(%d).String()", int64(tt.n))
	}
}
