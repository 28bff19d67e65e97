package guard

import (
	"fmt"

	"github.com/stintlab/stint/budget"
)

// Worth prices u at c's model's current price: what a cache-served answer
// would have cost (the Stint-Saved-Usd header). It reads no backend, so the
// proxy can answer at once and journal the saving with Saved afterwards.
// Prices are configured estimates; the provider's bill is the record.
func (g *Guard) Worth(c Call, u Usage) (budget.Nanos, error) {
	if u.PromptTokens < 0 || u.CompletionTokens < 0 || u.CachedPromptTokens < 0 {
		return 0, fmt.Errorf("%w: negative usage %+v", ErrBadCall, u)
	}
	rate, err := g.cfg.Prices.Rate(c.Model)
	if err != nil {
		return 0, err
	}
	bu := budget.Usage{InputTokens: u.PromptTokens, CachedInputTokens: min(u.CachedPromptTokens, u.PromptTokens), OutputTokens: u.CompletionTokens}
	n, err := rate.Cost(bu)
	if err != nil {
		return 0, fmt.Errorf("guard: price usage: %w", err)
	}
	return n, nil
}
