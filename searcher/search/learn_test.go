package search_test

import (
	"context"
	"fmt"
	"math/rand/v2"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/baseline"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/scorer/scorertest"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/task"
)

// learningSteps is how long the learning test trains: a third of the
// example task's 90 steps.
const learningSteps = 30

// learnedMargin is how many points of training accuracy the policy's
// proposals must gain over random prompts' for the search to have
// learned. On the reading-corner task random 5-token prompts average
// about 52% on the training lines (the task suite's survey in
// testdata/README.md) and a learning search's samples pass 80% within 30
// steps on every seed tried.
const learnedMargin = 0.20

// proposalGain trains the search on the reading-corner task (a suite
// task) for learningSteps steps at seed, then judges 64 prompts the policy
// proposes and 64 uniformly random prompts of the same actions on every
// training line, and returns the difference of their mean accuracies.
// zero trains on zero rewards: a broken learner.
func proposalGain(t *testing.T, rig scorertest.Rig, seed int64, zero bool) float64 {
	t.Helper()
	ctx := context.Background()
	tk := rig.Task(t, "steps: 90", fmt.Sprintf("steps: %d", learningSteps), "seed: 7", fmt.Sprintf("seed: %d", seed), "run: [best-of-n, halving]", "run: []")
	vocab := search.NewLocalVocab(rig.Model.Tokenizer(), tk.AllowList)
	tk.Reward.Factor = task.AutoRewardFactor(tk.Reward.Kind, tk.PromptLength, len(vocab.Actions()))
	backbone, err := policy.NewLocal(rig.Model, policy.LocalOptions{})
	require.NoError(t, err)
	tr, err := policy.NewTrainer(backbone, policy.Config{PromptLength: tk.PromptLength, Seed: uint64(seed), Actions: vocab.Actions(),
		LearningRate: tk.Policy.LearningRate, TopK: tk.Policy.TopK, Polyak: tk.Policy.TargetRate})
	require.NoError(t, err)
	sc := rig.Scorer(t, tk)
	_, err = search.Run(ctx, search.Options{Task: tk, Scorer: sc, Policy: search.Trainer{Trainer: tr}, Vocab: vocab, ZeroRewards: zero})
	require.NoError(t, err)

	ids, err := tr.Sample(ctx, 64)
	require.NoError(t, err)
	proposed := make([]string, len(ids))
	for i, p := range ids {
		proposed[i] = vocab.Text(p)
	}
	rng := rand.New(rand.NewPCG(uint64(seed), 99))
	random := make([]string, len(ids))
	for i := range random {
		random[i] = baseline.Draw(rng, vocab, tk.PromptLength)
	}
	p := judge.New(tk, sc)
	mean := func(prompts []string) float64 {
		vs, err := p.Complete(ctx, prompts, tk.Train)
		require.NoError(t, err)
		s := 0.0
		for _, v := range vs {
			s += judge.Accuracy(v)
		}
		return s / float64(len(vs))
	}
	return mean(proposed) - mean(random)
}

// TestTheSearchLearns: on a suite task at fixed seeds the policy's
// proposals after training beat uniformly random prompts' training
// accuracy by learnedMargin on every seed, and the same search trained
// on zero rewards does not on any: the statistic tells a learner from a
// broken one.
func TestTheSearchLearns(t *testing.T) {
	rig := scorertest.Start(t)
	for _, seed := range []int64{1, 2} {
		gain := proposalGain(t, rig, seed, false)
		broken := proposalGain(t, rig, seed, true)
		t.Logf("seed %d: proposals beat random prompts by %.1f points; with zero rewards by %.1f", seed, 100*gain, 100*broken)
		assert.GreaterOrEqual(t, gain, learnedMargin, "seed %d: the search's proposals gain %.3f over random prompts", seed, gain)
		assert.Less(t, broken, learnedMargin, "seed %d: a learner on zero rewards passes the test too (%.3f)", seed, broken)
	}
}
