package judge_test

import (
	"context"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/reward"
	"github.com/stintlab/stint/searcher/scorer/scorertest"
)

// TestPanelCountsWhatItAsks: Judge asks again for texts it has judged
// (they are judgements, answered from the proxy's cache when there is
// one), Complete asks only for what it lacks, and New counts the texts
// the panel had never been given, a text twice in one request once.
// Counts are hand-worked from the calls made.
func TestPanelCountsWhatItAsks(t *testing.T) {
	rig := scorertest.Start(t)
	tk := rig.Task(t)
	p := judge.New(tk, rig.Scorer(t, tk))
	ctx := context.Background()
	lines := tk.Train[:3]

	steps := []struct {
		name                string
		do                  func() error
		judgements, newText int
	}{
		{"judge two prompts on three lines", func() error { _, err := p.Judge(ctx, []string{"play that", "the big"}, lines); return err }, 6, 6},
		{"judge one of them again", func() error { _, err := p.Judge(ctx, []string{"play that"}, lines); return err }, 9, 6},
		{"complete what is known", func() error { _, err := p.Complete(ctx, []string{"the big"}, lines); return err }, 9, 6},
		{"complete one more line", func() error { _, err := p.Complete(ctx, []string{"the big"}, tk.Train[:4]); return err }, 10, 7},
		{"a prompt twice in one request", func() error { _, err := p.Judge(ctx, []string{"so happy", "so happy"}, lines[:1]); return err }, 12, 8},
	}
	for _, s := range steps {
		require.NoError(t, s.do(), s.name)
		got := p.Tally()
		assert.Equal(t, s.judgements, got.Judgements, "%s: judgements", s.name)
		assert.Equal(t, s.newText, got.New, "%s: new texts", s.name)
	}
	assert.Equal(t, 1, p.Missing("the big", tk.Train[:5]), "missing verdicts of a prompt judged on 4 of 5 lines")
	assert.Equal(t, p.Tally().Lookups, p.Tally().Judgements*len(tk.Labels), "one look-up per label per judgement")
}

// TestVerdictsAreTheRewardsJudgement: a verdict is reward.Judge on the
// answer's probabilities, its Raw the task's reward of that judgement.
func TestVerdictsAreTheRewardsJudgement(t *testing.T) {
	rig := scorertest.Start(t)
	tk := rig.Task(t)
	sc := rig.Scorer(t, tk)
	p := judge.New(tk, sc)
	ctx := context.Background()
	vs, err := p.Judge(ctx, []string{"Lily is a girl."}, tk.Dev)
	require.NoError(t, err)
	texts := make([]string, len(tk.Dev))
	for i, e := range tk.Dev {
		texts[i] = tk.Fill(e.Text, "Lily is a girl.")
	}
	res, err := sc.Score(ctx, texts)
	require.NoError(t, err)
	for i, top := range res.Top {
		probs, _, err := tk.Reward.Probabilities(top, tk.Verbalizers())
		require.NoError(t, err)
		j, err := reward.Judge(probs, tk.LabelIndex(tk.Dev[i].Label))
		require.NoError(t, err)
		assert.Equal(t, judge.Verdict{Correct: j.Correct, Gap: j.Gap, Raw: tk.Reward.Raw(j)}, vs[0][i], "line %d", i)
	}
}

// TestMemoryRoundTrip: a restored panel knows what the saved one knew and
// asks for nothing more; a memory whose tally does not match its
// verdicts is refused.
func TestMemoryRoundTrip(t *testing.T) {
	rig := scorertest.Start(t)
	tk := rig.Task(t)
	ctx := context.Background()
	p := judge.New(tk, rig.Scorer(t, tk))
	_, err := p.Judge(ctx, []string{"play that", "the big"}, tk.Train[:4])
	require.NoError(t, err)

	q := judge.New(tk, rig.Scorer(t, tk))
	require.NoError(t, q.Restore(p.Save()))
	_, err = q.Complete(ctx, []string{"the big"}, tk.Train[:4])
	require.NoError(t, err)
	assert.Equal(t, p.Tally(), q.Tally(), "nothing asked after a restore")
	assert.Equal(t, p.Texts(), q.Texts())

	bad := p.Save()
	bad.Tally.New++
	assert.ErrorIs(t, q.Restore(bad), judge.ErrMemory)
}

func TestTallyArithmetic(t *testing.T) {
	a := judge.Tally{Judgements: 5, New: 3, Calls: 2, CostUSD: 0.5, RunCostUSD: 0.5, AloneUSD: 0.75, Floored: 1, Lookups: 10}
	b := judge.Tally{Judgements: 2, New: 1, Calls: 1, CostUSD: 0.25, RunCostUSD: 0.25, AloneUSD: 0.25, Floored: 0, Lookups: 4}
	assert.Equal(t, a, a.Add(b).Sub(b))
	assert.Equal(t, 0.75, a.Spend(true), "priced: the spend alone in USD")
	assert.Equal(t, 3.0, a.Spend(false), "unpriced: the new texts")
}
