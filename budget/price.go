package budget

import (
	"errors"
	"fmt"
	"math"
	"math/bits"
	"sort"
)

// ErrUnknownModel is returned by PriceTable.Rate for a model that has no
// price when the table has no default price. The proxy answers it with 400.
var ErrUnknownModel = errors.New("budget: no price for model")

// ErrBadPrice reports a price table entry that is negative, not a number or
// implausibly large; the error text names the model and the field.
var ErrBadPrice = errors.New("budget: bad price")

// maxPriceUSD is the largest price accepted, in USD per million tokens. It
// is far above any real price and catches unit mistakes (a price per token
// typed where a price per million was meant).
const maxPriceUSD = 1e6

// Price is what one model costs, in US dollars per million tokens, as written
// in the configuration.
type Price struct {
	// Input is the price of prompt tokens.
	Input float64
	// Output is the price of generated tokens.
	Output float64
	// CachedInput is the price of prompt tokens the provider reports as
	// served from its own prompt cache. Nil means the provider has no such
	// price and cached tokens are charged at Input.
	CachedInput *float64
}

// PriceTable maps model names to prices. The zero value has no prices and
// rejects every model.
type PriceTable struct {
	// Models maps a model name, exactly as clients send it, to its price.
	Models map[string]Price
	// Default, when not nil, prices every model missing from Models. When
	// nil, such models are rejected with ErrUnknownModel.
	Default *Price
}

// Rate is a price converted to exact integers: Nanos per million tokens.
// Its zero value prices everything at zero.
type Rate struct {
	Input       Nanos // per million prompt tokens
	CachedInput Nanos // per million cached prompt tokens
	Output      Nanos // per million generated tokens
}

// Usage is a count of tokens, as reported by the upstream's usage object or
// as estimated before a call.
type Usage struct {
	// InputTokens counts all prompt tokens, cached ones included.
	InputTokens int64
	// CachedInputTokens is the part of InputTokens the provider served from
	// its prompt cache; it must not exceed InputTokens.
	CachedInputTokens int64
	// OutputTokens counts generated tokens.
	OutputTokens int64
}

// Validate checks every price in the table and returns an error that names
// the first bad model (in name order) and field, wrapping ErrBadPrice.
func (t PriceTable) Validate() error {
	names := make([]string, 0, len(t.Models))
	for name := range t.Models {
		names = append(names, name)
	}
	sort.Strings(names)
	for _, name := range names {
		if name == "" {
			return fmt.Errorf("%w: empty model name", ErrBadPrice)
		}
		if _, err := t.Models[name].rate(); err != nil {
			return fmt.Errorf("model %q: %w", name, err)
		}
	}
	if t.Default != nil {
		if _, err := t.Default.rate(); err != nil {
			return fmt.Errorf("default price: %w", err)
		}
	}
	return nil
}

// Rate returns the integer rate for model: its own price, else the default
// price, else an error wrapping ErrUnknownModel that names the model. A bad
// price gives an error wrapping ErrBadPrice; call Validate at start-up so
// that never happens while serving.
func (t PriceTable) Rate(model string) (Rate, error) {
	p, ok := t.Models[model]
	if !ok {
		if t.Default == nil {
			return Rate{}, fmt.Errorf("%w %q (add it under prices, or set a default price)", ErrUnknownModel, model)
		}
		p = *t.Default
	}
	r, err := p.rate()
	if err != nil {
		return Rate{}, fmt.Errorf("model %q: %w", model, err)
	}
	return r, nil
}

// rate converts p to Nanos per million tokens, rejecting bad fields.
func (p Price) rate() (Rate, error) {
	conv := func(field string, usd float64) (Nanos, error) {
		switch {
		case math.IsNaN(usd) || math.IsInf(usd, 0):
			return 0, fmt.Errorf("%w: %s is %v, want a finite number of USD per million tokens", ErrBadPrice, field, usd)
		case usd < 0:
			return 0, fmt.Errorf("%w: %s is %v, want >= 0", ErrBadPrice, field, usd)
		case usd > maxPriceUSD:
			return 0, fmt.Errorf("%w: %s is %v USD per million tokens, above the sanity limit %v", ErrBadPrice, field, usd, maxPriceUSD)
		}
		return Nanos(math.Round(usd * 1e9)), nil
	}
	var r Rate
	var err error
	if r.Input, err = conv("input", p.Input); err != nil {
		return Rate{}, err
	}
	if r.Output, err = conv("output", p.Output); err != nil {
		return Rate{}, err
	}
	r.CachedInput = r.Input
	if p.CachedInput != nil {
		if r.CachedInput, err = conv("cached_input", *p.CachedInput); err != nil {
			return Rate{}, err
		}
	}
	return r, nil
}

// Cost returns what u costs at r, rounded up to the next nano-dollar.
//
// The result is an estimate of what the provider will bill: it is exact
// arithmetic on the configured prices and the given token counts, but the
// provider's own rounding, price changes and token accounting may differ.
// Before a call, pass the worst case (counted prompt tokens, max_tokens × n
// output tokens) and reserve the result; after it, pass the upstream's usage.
//
// The sum is computed in 128-bit integers and divided once, so no precision
// is lost; an error wrapping ErrBadAmount reports negative or inconsistent
// counts, or a cost above MaxNanos.
func (r Rate) Cost(u Usage) (Nanos, error) {
	if u.InputTokens < 0 || u.CachedInputTokens < 0 || u.OutputTokens < 0 {
		return 0, fmt.Errorf("%w: negative token count in %+v", ErrBadAmount, u)
	}
	if u.CachedInputTokens > u.InputTokens {
		return 0, fmt.Errorf("%w: %d cached input tokens exceed %d input tokens", ErrBadAmount, u.CachedInputTokens, u.InputTokens)
	}
	if r.Input < 0 || r.CachedInput < 0 || r.Output < 0 {
		return 0, fmt.Errorf("%w: negative rate %+v", ErrBadAmount, r)
	}
	var hi, lo uint64
	add := func(tokens int64, perM Nanos) bool {
		h, l := bits.Mul64(uint64(tokens), uint64(perM))
		var c uint64
		lo, c = bits.Add64(lo, l, 0)
		hi, c = bits.Add64(hi, h, c)
		return c == 0
	}
	ok := add(u.InputTokens-u.CachedInputTokens, r.Input) &&
		add(u.CachedInputTokens, r.CachedInput) &&
		add(u.OutputTokens, r.Output)
	// Round up: add 999,999 before dividing by one million.
	if ok {
		var c uint64
		lo, c = bits.Add64(lo, 1e6-1, 0)
		hi, c = bits.Add64(hi, 0, c)
		ok = c == 0
	}
	if !ok || hi >= 1e6 {
		return 0, fmt.Errorf("%w: cost of %+v overflows", ErrBadAmount, u)
	}
	q, _ := bits.Div64(hi, lo, 1e6)
	if q > uint64(MaxNanos) {
		return 0, fmt.Errorf("%w: cost of %+v is above %s USD", ErrBadAmount, u, MaxNanos)
	}
	return Nanos(q), nil
}
