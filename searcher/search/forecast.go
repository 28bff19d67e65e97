package search

import (
	"errors"
	"fmt"
	"math"
	"strings"

	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

// Plan is how many judgements (prompt × example scorings) a search will
// make and about how many prompt tokens they hold.
type Plan struct {
	// Search is the RL search's budget: its steps, its curve's dev
	// evaluations and its choice.
	Search int
	// Baselines is what the task's baselines make: Search each.
	Baselines int
	// Evaluation scores every contender on train, dev and test.
	Evaluation         int
	TokensPerJudgement int // an upper bound (see scorer.EstimateTokens)
}

// Judgements is the total.
func (p Plan) Judgements() int { return p.Search + p.Baselines + p.Evaluation }

// Cost is the plan's forecast at price: an estimate that ignores the
// cache (hits cost nothing), so a search that repeats itself pays less.
func (p Plan) Cost(price scorer.Price) float64 {
	return scorer.Forecast(p.Judgements(), p.TokensPerJudgement, price)
}

// examplesPerStep is how many training examples each prompt is judged on
// in a step: the task's examples_per_step, at most the whole train set.
func examplesPerStep(t *task.Task) int { return min(t.ExamplesPerStep, len(t.Train)) }

// Budget is how the RL search's judgements divide.
type Budget struct {
	// Steps is the training steps' judgements: steps × prompts per step ×
	// examples per step.
	Steps int
	// Curve is at most the judgements of scoring the greedy prompt on the
	// dev set every EvalEvery steps (repeats of a prompt are free).
	Curve, EvalEvery int
	// Choice is kept for choosing the final prompt: the task's
	// choose.share of the whole budget.
	Choice int
}

// Total is the whole budget, and what each baseline is given.
func (b Budget) Total() int { return b.Steps + b.Curve + b.Choice }

// BudgetFor divides t's search with the given dev-evaluation interval (0:
// every tenth of the steps, as Run uses).
func BudgetFor(t *task.Task, evalEvery int) Budget {
	if evalEvery <= 0 {
		evalEvery = max(1, t.Steps/10)
	}
	evals := t.Steps / evalEvery
	if t.Steps%evalEvery != 0 {
		evals++
	}
	b := Budget{Steps: t.Steps * t.PromptsPerStep * examplesPerStep(t), Curve: evals * len(t.Dev), EvalEvery: evalEvery}
	if s := t.Choose.Share; s > 0 && s < 1 {
		b.Choice = int(math.Round(s / (1 - s) * float64(b.Steps+b.Curve)))
	}
	return b
}

// PlanFor forecasts a search of t with the given dev-evaluation interval
// (0: the default, as Run uses).
func PlanFor(t *task.Task, evalEvery int) Plan {
	contenders := 3 + len(t.ManualPrompts) + len(t.Baselines.Run) // rl, rl-greedy, empty, the manual prompts, the baselines
	longest := 0
	for _, set := range [][]task.Example{t.Train, t.Dev, t.Test} {
		for _, e := range set {
			longest = max(longest, len(e.Text))
		}
	}
	// A prompt token is at most a word piece; count it generously.
	prompt := strings.Repeat("x", 12*t.PromptLength)
	total := BudgetFor(t, evalEvery).Total()
	return Plan{
		Search:             total,
		Baselines:          len(t.Baselines.Run) * total,
		Evaluation:         contenders * (len(t.Train) + len(t.Dev) + len(t.Test)),
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
