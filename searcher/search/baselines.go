package search

import (
	"context"
	"fmt"
	"math/rand/v2"
	"slices"

	"github.com/stintlab/stint/searcher/baseline"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/task"
)

// streamOneBatch is the PCG stream of the one-batch random baseline.
const streamOneBatch = 0x6f6e652d62617463 // "one-batc"

// Drawer returns the random-prompt drawer a baseline of t with seed uses
// on stream: a survey drawing from the same seed and stream judges the
// same prompts first, so a later search finds them in the proxy's cache.
func Drawer(t *task.Task, v Vocabulary, seed int64, stream uint64) func() string {
	rng := rand.New(rand.NewPCG(uint64(seed), stream))
	return func() string { return baseline.Draw(rng, v, t.PromptLength) }
}

// The streams best-of-N and halving draw their prompts and pools from
// (see Drawer and Pool).
const (
	StreamBestOfN = streamBestOfN
	StreamHalving = streamHalving
)

// baseline runs the named baseline at the search's budget with a panel
// of its own, so its tally is its own.
func (r *runner) baseline(ctx context.Context, name string, res *Results) (Contender, error) {
	c := Contender{Method: name}
	p := judge.New(r.t, recordingScorer{sc: r.o.Scorer, calls: &r.calls, sent: r.sent})
	budget := r.budget.Total()
	r.counting(name, budget)
	defer func() { r.phase = nil }()
	var err error
	switch name {
	case task.BestOfN:
		pool := Pool(r.t, r.t.Seed, streamBestOfN)
		var b baseline.Result
		b, err = baseline.BestOfN(ctx, p, Drawer(r.t, r.o.Vocab, r.t.Seed, streamBestOfN), pool, budget)
		c.Prompt = b.Choice.Prompt
		res.Extras.BestOfN, res.Extras.Pool = b.Judged, len(pool)
	case task.Halving:
		pool := Pool(r.t, r.t.Seed, streamHalving)
		var b baseline.Result
		b, err = baseline.Halving(ctx, p, Drawer(r.t, r.o.Vocab, r.t.Seed, streamHalving), pool, budget, r.t.Baselines.HalvingFirst)
		c.Prompt = b.Choice.Prompt
	case task.OneBatch:
		c.Prompt, err = r.oneBatch(ctx, p, budget)
	default:
		err = fmt.Errorf("search: no baseline %q", name)
	}
	if err != nil {
		return c, fmt.Errorf("search: %s baseline: %w", name, err)
	}
	c.searched(p.Tally())
	r.done = r.done.Add(p.Tally())
	r.progress(Progress{Phase: name, Done: budget, Total: budget})
	return c, r.checkCap("in the " + name + " baseline")
}

// oneBatch draws uniformly random prompts and keeps the one with the best
// raw reward on one train batch, spending budget judgements: the
// weakest of the baselines (its winner is mostly the luckiest on a few
// lines), kept for comparison with earlier results.
func (r *runner) oneBatch(ctx context.Context, p *judge.Panel, budget int) (string, error) {
	draw := Drawer(r.t, r.o.Vocab, r.t.Seed, streamOneBatch)
	perPrompt := examplesPerStep(r.t)
	// Every prompt is judged on the same batch, so their rewards compare
	// like with like.
	batch := slices.Clone(r.t.Train)
	rng := rand.New(rand.NewPCG(uint64(r.t.Seed), streamOneBatch))
	rng.Shuffle(len(batch), func(i, j int) { batch[i], batch[j] = batch[j], batch[i] })
	batch = batch[:perPrompt]
	best, bestScore, spent := "", 0.0, 0
	for spent+perPrompt <= budget {
		n := min(r.t.PromptsPerStep, (budget-spent)/perPrompt)
		texts := make([]string, n)
		for i := range texts {
			texts[i] = draw()
		}
		vs, err := p.Judge(ctx, texts, batch)
		if err != nil {
			return "", err
		}
		for i, row := range vs {
			if s := judge.MeanRaw(row); spent == 0 && i == 0 || s > bestScore {
				best, bestScore = texts[i], s
			}
		}
		spent += n * perPrompt
	}
	return best, nil
}
