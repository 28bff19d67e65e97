package search

import (
	"encoding/csv"
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"strings"

	"github.com/stintlab/stint/searcher/scorer"
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
		calls, usd := c.Spend()
		fmt.Fprintf(&b, "%-9s %-36s %7s %7s %7s %11d %6d %10.6f\n", c.Method, strconv.Quote(c.Prompt), pct(c.TrainAcc), pct(c.DevAcc), pct(c.TestAcc), c.Calls, calls, usd)
	}
	return b.String()
}

// pct renders an accuracy; "-" for −1 (no such set, or not evaluated).
func pct(x float64) string {
	if x < 0 {
		return "-"
	}
	return strconv.FormatFloat(100*x, 'f', 1, 64) + "%"
}

// SpendLine says what a search's calls did through the proxy, each share
// named for what it counts: texts from the cache (of the texts scored) and
// calls from the cache (of the calls, those that reached no upstream). A
// replay says it made no upstream call and what the recording was charged,
// the figure its table shows.
func SpendLine(s scorer.Totals, replay bool) string {
	if replay {
		return fmt.Sprintf("%d scoring calls answered from the run's journal (no upstream call, nothing spent now); the recording was charged %.6f USD (the proxy's estimate)",
			s.Calls, s.RunCostUSD)
	}
	return fmt.Sprintf("%d scoring calls, %d of them upstream (%.1f%% of calls from the cache), %d texts (%.1f%% of texts from the cache), %.6f USD reported by the proxy (an estimate)",
		s.Calls, s.Upstream, 100*s.CallShare(), s.Prompts, 100*s.CacheShare(), s.RunCostUSD)
}

// WriteReport writes a short Markdown report: the results table, the
// proxy's figures, what each search cost through the proxy against the same
// calls straight to the upstream, and how often verbalizers were missing
// from the answers.
func WriteReport(w io.Writer, r Results, wall string) error {
	s := r.Spending
	var stopped string
	if r.Stopped != "" {
		stopped = "\n**Partial results**: the search stopped part way (" + r.Stopped + "); its checkpoint resumes it.\n"
	}
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
%s
## Through the proxy

- scoring calls: %d, of them %d to the upstream: %.1f%% of calls from the cache (answered with no upstream call)
- texts scored: %d, %.1f%% of texts from the cache (of the texts in those calls, those the cache answered)
- spend reported by the proxy: %.6f USD; the same calls straight to the upstream: %.6f USD (estimates from the proxy's configured prices; the provider's bill is the record)
- verbalizers missing from the returned log-probabilities: %d of %d look-ups
- wall time: %s

%s
![learning curve](learning-curve.svg)
`, r.Task, r.Seed, r.Steps, r.Budget, stopped, "```\n"+Table(r)+"```\n", s.Calls, s.Upstream, 100*s.CallShare(), s.Prompts, 100*s.CacheShare(),
		s.RunCostUSD, s.PriceUSD, r.Floored, r.Lookups, wall, withoutProxy(r))
	return err
}

// withoutProxy is the report's table of what each search (the RL search,
// its choice included, and each baseline) cost to find its prompt, and so
// reach its final dev accuracy: upstream calls and spend through the proxy
// against the same calls sent straight to the upstream, where every call
// goes and is paid at its price before the cache.
func withoutProxy(r Results) string {
	var b strings.Builder
	b.WriteString(`## Each search with the proxy and without it

What finding its prompt (and so reaching its final dev accuracy) took each
search: through the proxy, the calls that reached the upstream and what the
proxy charged; straight to the upstream, every call and its price before the
cache. The difference is what the cache saved; a replay makes no upstream
call at all.

| search | dev | calls | upstream calls (proxy) | USD (proxy) | upstream calls (no proxy) | USD (no proxy) | calls from the cache |
| --- | --- | --- | --- | --- | --- | --- | --- |
`)
	for _, c := range r.Ranking {
		if c.SearchCalls == 0 || c.Method == MethodRLGreedy {
			continue
		}
		fmt.Fprintf(&b, "| %s | %s | %d | %d | %.6f | %d | %.6f | %.1f%% |\n", c.Method, pct(c.DevAcc), c.SearchCalls, c.SearchUpstream, c.SearchSpendUSD,
			c.SearchCalls, c.SearchPriceUSD, 100*share(c.SearchCalls-c.SearchUpstream, c.SearchCalls))
	}
	return b.String()
}
