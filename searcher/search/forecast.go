package search

import (
	"errors"
	"fmt"
	"strings"

	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

// Plan is how many judgements (prompt × example scorings) a search will
// make and about how many prompt tokens they hold.
type Plan struct {
	Search, Random, Evaluation int // judgements of each part
	TokensPerJudgement         int // an upper bound (see scorer.EstimateTokens)
}

// Judgements is the total.
func (p Plan) Judgements() int { return p.Search + p.Random + p.Evaluation }

// Cost is the plan's forecast at price: an estimate that ignores the
// cache (hits cost nothing), so a search that repeats itself pays less.
func (p Plan) Cost(price scorer.Price) float64 {
	return scorer.Forecast(p.Judgements(), p.TokensPerJudgement, price)
}

// examplesPerStep is how many training examples each prompt is judged on
// in a step: the task's examples_per_step, at most the whole train set.
func examplesPerStep(t *task.Task) int { return min(t.ExamplesPerStep, len(t.Train)) }

// searchJudgements is how many judgements the RL search makes, and so the
// budget of random search.
func searchJudgements(t *task.Task) int { return t.Steps * t.PromptsPerStep * examplesPerStep(t) }

// PlanFor forecasts a search of t with the given dev-evaluation interval
// (0: the default, as Run uses).
func PlanFor(t *task.Task, evalEvery int) Plan {
	if evalEvery <= 0 {
		evalEvery = max(1, t.Steps/10)
	}
	evals := t.Steps / evalEvery
	if t.Steps%evalEvery != 0 {
		evals++
	}
	contenders := 4 + len(t.ManualPrompts) // rl, rl-best, empty, random and the manual prompts
	longest := 0
	for _, set := range [][]task.Example{t.Train, t.Dev, t.Test} {
		for _, e := range set {
			longest = max(longest, len(e.Text))
		}
	}
	// A prompt token is at most a word piece; count it generously.
	prompt := strings.Repeat("x", 12*t.PromptLength)
	return Plan{
		Search:             searchJudgements(t),
		Random:             searchJudgements(t),
		Evaluation:         evals*len(t.Dev) + contenders*(len(t.Train)+len(t.Dev)+len(t.Test)),
		TokensPerJudgement: scorer.EstimateTokens(t.Fill(strings.Repeat("x", longest), prompt)),
	}
}

// PriceOverride replaces a task's prices field by field, as
// --input-price and --output-price do; a nil field keeps the task's.
type PriceOverride struct {
	InputPerMillion, OutputPerMillion *float64
}

// Pricing is the price a forecast is made at.
type Pricing struct {
	Price scorer.Price
	// Missing names what to set for each price neither the task nor the
	// override gives ("prices.input_per_million or --input-price"); empty
	// when the price is known.
	Missing []string
}

// Known reports whether both prices are set.
func (p Pricing) Known() bool { return len(p.Missing) == 0 }

// PricingFor is the task's prices (nil: none) with o applied over them.
func PricingFor(prices *task.Prices, o PriceOverride) Pricing {
	var p Pricing
	in, out := o.InputPerMillion, o.OutputPerMillion
	if prices != nil {
		if in == nil {
			in = &prices.InputPerMillion
		}
		if out == nil {
			out = &prices.OutputPerMillion
		}
	}
	if in != nil {
		p.Price.InputPerMillion = *in
	} else {
		p.Missing = append(p.Missing, "prices.input_per_million or --input-price")
	}
	if out != nil {
		p.Price.OutputPerMillion = *out
	} else {
		p.Missing = append(p.Missing, "prices.output_per_million or --output-price")
	}
	return p
}

// Errors CheckCap refuses a search with.
var (
	// ErrNoPrice: the task has a spend cap but no price to forecast
	// against.
	ErrNoPrice = errors.New("search: the task has a spend cap but no price to forecast it against")
	// ErrOverCap: the forecast is over the task's spend cap.
	ErrOverCap = errors.New("search: the forecast is over the task's spend cap")
)

// CheckCap decides whether a search with spend cap capUSD (0: none) may
// start at forecast USD priced by p. overCap starts it anyway; note then
// says what still holds the cap (the spend the proxy reports). A search
// without a cap always starts.
func CheckCap(capUSD, forecast float64, p Pricing, overCap bool) (note string, err error) {
	switch {
	case capUSD <= 0:
		return "", nil
	case !p.Known() && overCap:
		return fmt.Sprintf("starting without a price (--over-cap): there is no forecast in USD, so the spend_cap_usd of %.4f USD can only be enforced from the spend the proxy reports", capUSD), nil
	case !p.Known():
		return "", fmt.Errorf("%w (spend_cap_usd %.4f): set %s (USD per million tokens), or start with --over-cap and the cap is enforced only from the spend the proxy reports",
			ErrNoPrice, capUSD, strings.Join(p.Missing, ", and "))
	case forecast > capUSD && overCap:
		return fmt.Sprintf("starting over the cap (--over-cap): the forecast %.4f USD is over spend_cap_usd %.4f; the search stops once the spend the proxy reports reaches the cap", forecast, capUSD), nil
	case forecast > capUSD:
		return "", fmt.Errorf("%w: %.4f USD over spend_cap_usd %.4f: lower steps, prompts_per_step or examples_per_step, or start it with --over-cap (the cache usually makes the real spend lower; the search still stops once the spend the proxy reports reaches the cap)",
			ErrOverCap, forecast, capUSD)
	}
	return "", nil
}
