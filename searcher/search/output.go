package search

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"strings"
)

// WriteResults writes r as indented JSON. The output depends only on the
// search's decisions and the answers it got, so a replay writes the same
// bytes.
func WriteResults(w io.Writer, r Results) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(r)
}

// WriteHistory writes one CSV line per step.
func WriteHistory(w io.Writer, h []Point) error {
	cw := csv.NewWriter(w)
	if err := cw.Write([]string{"step", "mean_reward", "train_accuracy", "dev_accuracy", "loss", "greedy_prompt"}); err != nil {
		return err
	}
	f := func(x float64) string { return strconv.FormatFloat(x, 'g', 8, 64) }
	for _, p := range h {
		dev := ""
		if p.DevAcc >= 0 {
			dev = f(p.DevAcc)
		}
		if err := cw.Write([]string{strconv.Itoa(p.Step), f(p.MeanReward), f(p.TrainAcc), dev, f(p.Loss), p.Prompt}); err != nil {
			return err
		}
	}
	cw.Flush()
	return cw.Error()
}

// Table renders the contenders as a text table. CALLS and SPENT USD are
// every scoring call of the method, finding its prompt and evaluating it,
// and what the proxy reported for them.
func Table(r Results) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%-9s %-36s %7s %7s %7s %11s %6s %10s\n", "METHOD", "PROMPT", "TRAIN", "DEV", "TEST", "JUDGEMENTS", "CALLS", "SPENT USD")
	for _, c := range r.Ranking {
		test := "-"
		if c.TestAcc >= 0 {
			test = pct(c.TestAcc)
		}
		calls, usd := c.Spend()
		fmt.Fprintf(&b, "%-9s %-36s %7s %7s %7s %11d %6d %10.6f\n", c.Method, strconv.Quote(c.Prompt), pct(c.TrainAcc), pct(c.DevAcc), test, c.Calls, calls, usd)
	}
	return b.String()
}

func pct(x float64) string { return strconv.FormatFloat(100*x, 'f', 1, 64) + "%" }

// WriteReport writes a short Markdown report: the results table, the
// proxy's figures and how often verbalizers were missing from the
// answers.
func WriteReport(w io.Writer, r Results, wall string) error {
	s := r.Spending
	_, err := fmt.Fprintf(w, `# Prompt search: %s

Seed %d, %d steps, a budget of %d judgements (prompt × example scorings).
"rl" is the search's choice: it keeps a share of its judgements and chooses
among its best candidates by successive halving on the train and dev lines;
"rl-greedy" (when it differs) is the policy's greedy prompt at the end. Each
baseline is given the search's whole budget and chooses by the same rule:
best-of-n judges random prompts on all train and dev lines and keeps the
best, halving judges many on a few lines and keeps the better half on twice
as many. Calls and spent are all of a method's scoring calls (finding its
prompt, then scoring it on train, dev and test) and what the proxy reported
for them; rl and rl-greedy come from one search, so its calls are in both.

%s
## Through the proxy

- scoring calls: %d (%d texts), %.1f%% of texts served from the cache
- spend reported by the proxy: %.6f USD (an estimate from its configured prices; the provider's bill is the record)
- verbalizers missing from the returned log-probabilities: %d of %d look-ups
- wall time: %s

![learning curve](learning-curve.svg)
`, r.Task, r.Seed, r.Steps, r.Budget, "```\n"+Table(r)+"```\n", s.Calls, s.Prompts, 100*s.CacheShare(), s.CostUSD, r.Floored, r.Lookups, wall)
	return err
}
