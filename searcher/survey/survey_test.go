package survey_test

import (
	"context"
	"slices"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/baseline"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/scorer/scorertest"
	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/survey"
)

// TestSurveyOnTheModel: a survey judges every prompt on all train and dev
// lines, asks for no more than Judgements, reports quantiles in order and
// the best prompt's accuracies, and draws the prompts best-of-N draws
// first with the same seed, so a search after it finds them judged.
func TestSurveyOnTheModel(t *testing.T) {
	rig := scorertest.Start(t)
	tk := rig.Task(t)
	vocab := search.NewLocalVocab(rig.Model.Tokenizer(), tk.AllowList)
	ctx := context.Background()
	p := judge.New(tk, rig.Scorer(t, tk))
	const n = 12
	rep, err := survey.Run(ctx, tk, vocab, p, survey.Options{Prompts: n, Seed: 3})
	require.NoError(t, err)

	lines := len(tk.Train) + len(tk.Dev)
	assert.Equal(t, lines, rep.Lines)
	assert.Len(t, rep.Prompts, n)
	assert.LessOrEqual(t, rep.Tally.Judgements, survey.Judgements(tk, n))
	assert.GreaterOrEqual(t, rep.Tally.Judgements, n*lines, "every prompt on every train and dev line")
	q := rep.Quantiles
	assert.True(t, slices.IsSorted([]float64{q["min"], q["q10"], q["q25"], q["median"], q["q75"], q["q90"], q["max"]}), "quantiles in order: %v", q)
	assert.Equal(t, q["max"], rep.Best.Accuracy, "the best prompt has the highest accuracy")
	assert.GreaterOrEqual(t, rep.BestTest, 0.0)
	assert.GreaterOrEqual(t, rep.EmptyTest, 0.0)

	// Best-of-N at the same seed, on the same lines, judges the same
	// prompts first: all known to a panel that did the survey.
	before := p.Tally().Judgements
	pool := search.Pool(tk, 3, search.StreamBestOfN)
	b, err := baseline.BestOfN(ctx, p, search.Drawer(tk, vocab, 3, search.StreamBestOfN), pool, n*len(pool))
	require.NoError(t, err)
	assert.Equal(t, before, p.Tally().Judgements, "best-of-N asked for nothing the survey had judged")
	for i, c := range b.Judged {
		assert.Equal(t, rep.Prompts[i].Prompt, c.Prompt, "draw %d", i)
		assert.Equal(t, rep.Prompts[i].Accuracy, c.Accuracy, "draw %d", i)
	}

	_, err = survey.Run(ctx, tk, vocab, p, survey.Options{Prompts: 0})
	assert.Error(t, err)
}
