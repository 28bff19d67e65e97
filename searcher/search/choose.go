package search

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"

	"github.com/stintlab/stint/searcher/pick"
	"github.com/stintlab/stint/searcher/task"
)

// CandidatePrior is how many lines' worth of the average accuracy a
// candidate's own record is blended with when candidates are ranked: a
// prompt right on all of 8 lines ranks below one right on 45 of 48.
const CandidatePrior = 8

// PCG streams of a search's seed, one for each thing it draws, so one
// part's draws do not depend on another's.
const (
	streamChoice  = 0x63686f6963652d31 // "choice-1"
	streamBestOfN = 0x626573742d6f662d // "best-of-"
	streamHalving = 0x68616c76696e672d // "halving-"
)

// ChoiceReport is how the RL search chose its prompt.
type ChoiceReport struct {
	// Candidates is how many of its prompts it chose among, of Sampled
	// distinct prompts it had judged.
	Candidates int `json:"candidates"`
	Sampled    int `json:"distinct_prompts"`
	// Prompt, Accuracy and Lines are the choice and its accuracy on the
	// Lines train and dev lines it was ranked on last.
	Prompt   string       `json:"prompt"`
	Accuracy float64      `json:"accuracy"`
	Lines    int          `json:"lines"`
	Rounds   []pick.Round `json:"rounds"`
}

// Pool is the lines every contender chooses its prompt on: the train and
// dev sets, in an order drawn from seed and stream, so each contender
// ranks its candidates on lines of its own drawing.
func Pool(t *task.Task, seed int64, stream uint64) []task.Example {
	pool := append(slices.Clone(t.Train), t.Dev...)
	rng := rand.New(rand.NewPCG(uint64(seed), stream))
	rng.Shuffle(len(pool), func(i, j int) { pool[i], pool[j] = pool[j], pool[i] })
	return pool
}

// choose picks the search's prompt: its Candidates best prompts by their
// record so far (accuracy on the train and dev lines they were judged on,
// blended with the average over CandidatePrior lines), chosen among by
// successive halving on the pool with the judgements the search has left.
func (r *runner) choose(ctx context.Context) (ChoiceReport, error) {
	pool := Pool(r.t, r.t.Seed, streamChoice)
	arms := r.rank(pool)
	rep := ChoiceReport{Sampled: len(r.sampled)}
	left := r.budget.Total() - r.rl.Tally().Judgements
	r.counting(PhaseChoice, max(left, 1))
	defer func() { r.phase = nil }()
	arms = arms[:min(len(arms), r.t.Choose.Candidates)]
	first := pick.FirstWithin(r.rl, arms, pool, left)
	for first == 0 && len(arms) > 1 {
		arms = arms[:len(arms)/2]
		first = pick.FirstWithin(r.rl, arms, pool, left)
	}
	if len(arms) == 0 {
		return rep, fmt.Errorf("search: the search has no prompt to choose")
	}
	rep.Candidates = len(arms)
	if first == 0 {
		// No budget left: the best by its record, without new judgements.
		rep.Prompt = arms[0]
		return rep, nil
	}
	ch, err := pick.Halve(ctx, r.rl, arms, pool, first)
	if err != nil {
		return rep, fmt.Errorf("search: choosing the prompt: %w", err)
	}
	rep.Prompt, rep.Accuracy, rep.Lines, rep.Rounds = ch.Prompt, ch.Accuracy, ch.Lines, ch.Rounds
	r.progress(Progress{Phase: PhaseChoice, Done: max(left, 1), Total: max(left, 1)})
	return rep, r.checkCap("choosing the prompt")
}

// rank orders the sampled prompts by their blended accuracy on pool's
// lines, the first sampled first on ties.
func (r *runner) rank(pool []task.Example) []string {
	type rec struct{ right, n int }
	recs := make([]rec, len(r.sampled))
	right, n := 0, 0
	for i, p := range r.sampled {
		for _, e := range pool {
			if v, ok := r.rl.Recall(p, e); ok {
				recs[i].n++
				if v.Correct {
					recs[i].right++
				}
			}
		}
		right += recs[i].right
		n += recs[i].n
	}
	avg := share(right, n)
	score := func(x rec) float64 { return (float64(x.right) + CandidatePrior*avg) / (float64(x.n) + CandidatePrior) }
	order := make([]int, len(r.sampled))
	for i := range order {
		order[i] = i
	}
	slices.SortStableFunc(order, func(a, b int) int {
		sa, sb := score(recs[a]), score(recs[b])
		switch {
		case sa > sb:
			return -1
		case sa < sb:
			return 1
		}
		return 0
	})
	out := make([]string, len(order))
	for i, j := range order {
		out[i] = r.sampled[j]
	}
	return out
}
