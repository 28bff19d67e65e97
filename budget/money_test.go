package budget_test

import (
	"errors"
	"math"
	"testing"

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
		if (err != nil) != tt.wantErr || got != tt.want {
			t.Errorf("FromUSD(%v) = %d, %v; want %d, error %v", tt.usd, got, err, tt.want, tt.wantErr)
		}
		if err != nil && !errors.Is(err, budget.ErrBadAmount) {
			t.Errorf("FromUSD(%v) error %v does not wrap ErrBadAmount", tt.usd, err)
		}
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
		if got := tt.n.String(); got != tt.want {
			t.Errorf("Nanos(%d).String() = %q, want %q", int64(tt.n), got, tt.want)
		}
	}
}
