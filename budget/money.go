package budget

import (
	"errors"
	"fmt"
	"math"
	"strconv"
	"strings"
)

// Nanos is an amount of money in US nano-dollars (1 USD = 1e9 Nanos).
//
// Money is kept as an integer so that sums are exact: a ledger's total is the
// plain sum of its charges, with no float rounding drift however many charges
// it holds. The unit is the nano-dollar rather than the micro-dollar because
// one token at a typical price (for example 0.10 USD per million tokens)
// costs 0.1 micro-dollars: micro-dollars would round every small charge,
// while in nano-dollars the per-token cost is exact for any price given with
// up to three decimals in USD per million tokens, and each charge is rounded
// up by less than one nano-dollar otherwise. An int64 holds about 9.2e9 USD;
// ledgers accept amounts up to [MaxNanos].
type Nanos int64

// NanosPerUSD is the number of Nanos in one US dollar.
const NanosPerUSD Nanos = 1_000_000_000

// MaxNanos is the largest amount (about 9,007,199 USD) a ledger accepts as a
// reservation, a charge or a limit: 2^53-1, the largest integer an IEEE
// double holds exactly, because the Redis backend does its arithmetic in Lua,
// whose numbers are doubles. Both backends enforce the same bound so they
// behave alike.
const MaxNanos Nanos = 1<<53 - 1

// ErrBadAmount reports a money amount that is negative, not finite or too
// large.
var ErrBadAmount = errors.New("budget: bad amount")

// FromUSD converts a dollar amount, as written in a configuration file, to
// Nanos rounded to the nearest nano-dollar. It rejects NaN, infinities,
// negative amounts and amounts above MaxNanos with an error wrapping
// ErrBadAmount.
func FromUSD(usd float64) (Nanos, error) {
	switch {
	case math.IsNaN(usd) || math.IsInf(usd, 0):
		return 0, fmt.Errorf("%w: %v USD is not a finite number", ErrBadAmount, usd)
	case usd < 0:
		return 0, fmt.Errorf("%w: %v USD is negative", ErrBadAmount, usd)
	case usd*1e9 > float64(MaxNanos):
		return 0, fmt.Errorf("%w: %v USD is above the largest amount %s USD", ErrBadAmount, usd, MaxNanos)
	}
	return Nanos(math.Round(usd * 1e9)), nil
}

// USD returns n in dollars as a float, for display and JSON only; never add
// these floats up, add the Nanos.
func (n Nanos) USD() float64 { return float64(n) / 1e9 }

// String formats n as an exact decimal number of dollars without a currency
// sign and without trailing zeros beyond the cents, for example "0.00125",
// "25.00" or "-1.50". The result is suitable for a Stint-Cost-Usd header.
func (n Nanos) String() string {
	neg := n < 0
	u := uint64(n)
	if neg {
		u = -u
	}
	whole, frac := u/1e9, u%1e9
	f := strings.TrimRight(fmt.Sprintf("%09d", frac), "0")
	for len(f) < 2 {
		f += "0"
	}
	s := strconv.FormatUint(whole, 10) + "." + f
	if neg {
		s = "-" + s
	}
	return s
}

// check reports whether n is a valid ledger amount: 0 <= n <= MaxNanos.
func (n Nanos) check(what string) error {
	if n < 0 || n > MaxNanos {
		return fmt.Errorf("%w: %s %d nano-USD is outside 0..%d", ErrBadAmount, what, int64(n), int64(MaxNanos))
	}
	return nil
}
