// Package pick chooses one prompt among candidates on a pool of task
// lines, by successive halving: every candidate is judged on the first
// lines of the pool, the better half is kept and judged on twice as many,
// and so on until one is left or the survivors have been judged on the
// whole pool, where the best of them is taken (Jamieson and Talwalkar
// 2016, "Non-stochastic best arm identification and hyperparameter
// optimization", AISTATS, successive halving with a doubling budget per
// arm; Karnin, Koren and Somekh 2013, "Almost optimal exploration in
// multi-armed bandits", ICML, for sequential halving's guarantee).
//
// Candidates are ranked on the same lines at every round (the pool's
// first d lines), by accuracy and then by mean raw reward, the earlier
// candidate winning a tie. Verdicts the panel already holds are reused
// and cost nothing; the schedule's cost (Cost) is an upper bound on the
// judgements a choice asks for.
//
// The same rule serves every contender of a search: best-of-N is one
// round on the whole pool (First = the pool's size), successive halving
// over random prompts starts from a few lines, and the RL search chooses
// among its own best candidates with what its budget leaves.
package pick

import (
	"context"
	"errors"
	"fmt"
	"slices"

	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/task"
)

// Panel judges prompts on lines; *judge.Panel is one.
type Panel interface {
	Complete(ctx context.Context, prompts []string, lines []task.Example) ([][]judge.Verdict, error)
}

// Round is one round of a choice.
type Round struct {
	// Candidates were judged on the pool's first Lines lines.
	Candidates int `json:"candidates"`
	Lines      int `json:"lines"`
	// Best is the round's leader and its accuracy on those lines.
	Best     string  `json:"best"`
	Accuracy float64 `json:"accuracy"`
}

// Choice is the chosen prompt.
type Choice struct {
	Prompt string `json:"prompt"`
	// Accuracy and MeanRaw are the prompt's on the Lines pool lines it
	// was last ranked on.
	Accuracy float64 `json:"accuracy"`
	MeanRaw  float64 `json:"mean_raw_reward"`
	Lines    int     `json:"lines"`
	Rounds   []Round `json:"rounds"`
}

// ErrNoCandidates is a choice among none.
var ErrNoCandidates = errors.New("pick: no candidates")

// Depths lists the lines per candidate of each round for n candidates on
// a pool of m lines starting from first: first, 2·first, 4·first, ...,
// capped at m, one round for each halving until the round leaves one
// candidate or has judged on all m lines.
func Depths(n, m, first int) []int {
	if n < 1 || m < 1 || first < 1 {
		return nil
	}
	var ds []int
	for d := min(first, m); ; d = min(2*d, m) {
		ds = append(ds, d)
		if n = (n + 1) / 2; n == 1 || d == m {
			return ds
		}
	}
}

// Cost is the judgements a choice among n new candidates on m lines from
// first makes: at most, since verdicts already held are free.
func Cost(n, m, first int) int {
	cost, prev := 0, 0
	for _, d := range Depths(n, m, first) {
		cost += n * (d - prev)
		prev = d
		n = (n + 1) / 2
	}
	return cost
}

// FirstFor is the largest first depth whose choice among n candidates on
// m lines costs at most budget, or 0 when even one line each is too much.
func FirstFor(n, m, budget int) int {
	best := 0
	for f := 1; f <= m; f++ {
		if Cost(n, m, f) <= budget {
			best = f
		}
	}
	return best
}

// CandidatesFor is the most candidates a choice on m lines from first can
// take within budget (0 when not even one).
func CandidatesFor(m, first, budget int) int {
	lo, hi := 0, budget+1 // Cost grows with n; find the last n that fits
	for lo+1 < hi {
		mid := (lo + hi) / 2
		if Cost(mid, m, first) <= budget {
			lo = mid
		} else {
			hi = mid
		}
	}
	return lo
}

// Counter counts the verdicts a panel lacks; *judge.Panel is one.
type Counter interface {
	Missing(prompt string, lines []task.Example) int
}

// FirstWithin is the largest first depth whose choice among candidates
// on pool asks c for at most budget judgements whichever candidates
// survive: each round is counted at the candidates lacking the most
// verdicts on that round's lines. It is 0 when not even one line each
// fits.
func FirstWithin(c Counter, candidates []string, pool []task.Example, budget int) int {
	arms := distinct(candidates)
	if len(arms) == 0 || len(pool) == 0 {
		return 0
	}
	// missing[a][l] counts arm a's missing verdicts among pool[:l].
	missing := make([][]int, len(arms))
	for a, p := range arms {
		missing[a] = make([]int, len(pool)+1)
		for l := range pool {
			missing[a][l+1] = missing[a][l] + c.Missing(p, pool[l:l+1])
		}
	}
	best := 0
	gains := make([]int, len(arms))
	for f := 1; f <= len(pool); f++ {
		cost, prev, n := 0, 0, len(arms)
		for _, d := range Depths(len(arms), len(pool), f) {
			for a := range arms {
				gains[a] = missing[a][d] - missing[a][prev]
			}
			slices.Sort(gains)
			for _, g := range gains[len(gains)-n:] {
				cost += g
			}
			prev, n = d, (n+1)/2
		}
		if cost <= budget {
			best = f
		}
	}
	return best
}

// Halve chooses among candidates (repeats are dropped, the first kept) on
// pool, starting at first lines each.
func Halve(ctx context.Context, p Panel, candidates []string, pool []task.Example, first int) (Choice, error) {
	arms := distinct(candidates)
	if len(arms) == 0 {
		return Choice{}, ErrNoCandidates
	}
	if len(pool) == 0 || first < 1 {
		return Choice{}, fmt.Errorf("pick: %d pool lines from depth %d", len(pool), first)
	}
	var ch Choice
	for _, d := range Depths(len(arms), len(pool), first) {
		vs, err := p.Complete(ctx, arms, pool[:d])
		if err != nil {
			return Choice{}, err
		}
		order := rank(vs)
		arms = pick(arms, order)
		vs = pick(vs, order)
		ch.Rounds = append(ch.Rounds, Round{Candidates: len(arms), Lines: d, Best: arms[0], Accuracy: judge.Accuracy(vs[0])})
		ch.Prompt, ch.Accuracy, ch.MeanRaw, ch.Lines = arms[0], judge.Accuracy(vs[0]), judge.MeanRaw(vs[0]), d
		arms = arms[:(len(arms)+1)/2]
	}
	return ch, nil
}

// rank orders candidates by accuracy, then mean raw reward, best first;
// ties keep the candidates' order.
func rank(vs [][]judge.Verdict) []int {
	type score struct{ acc, raw float64 }
	s := make([]score, len(vs))
	order := make([]int, len(vs))
	for i, v := range vs {
		s[i] = score{judge.Accuracy(v), judge.MeanRaw(v)}
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int {
		switch {
		case s[a].acc != s[b].acc:
			return cmpDesc(s[a].acc, s[b].acc)
		default:
			return cmpDesc(s[a].raw, s[b].raw)
		}
	})
	return order
}

func cmpDesc(a, b float64) int {
	switch {
	case a > b:
		return -1
	case a < b:
		return 1
	}
	return 0
}

func pick[T any](xs []T, order []int) []T {
	out := make([]T, len(order))
	for i, j := range order {
		out[i] = xs[j]
	}
	return out
}

func distinct(xs []string) []string {
	seen := map[string]bool{}
	var out []string
	for _, x := range xs {
		if !seen[x] {
			seen[x] = true
			out = append(out, x)
		}
	}
	return out
}
