package scorer

import (
	"context"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestRefusalKeepsTheAnswersInFlight: when one call is refused (402) while
// another is in flight, the other is not cancelled: its answer, already
// being paid for, reaches the memo, and no further call is sent. A client
// given that memo's answers takes them instead of asking again, so the
// retried Score sends only the calls never answered.
func TestRefusalKeepsTheAnswersInFlight(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	texts := barges[:3]
	// Whichever of the first two calls comes first is held a while and
	// answered; the other is refused.
	up.FailNext(1, upstreamtest.Fault{Delay: 200 * time.Millisecond})
	up.FailNext(1, upstreamtest.Fault{Status: 402, Body: `{"error":{"message":"budget exhausted","type":"budget_error","code":"budget_exhausted"}}`})
	memo := NewMemo()
	c := newClient(t, Options{BaseURL: up.URL(), Model: upstreamtest.ModelSmall, BatchSize: 1, Concurrency: 2, Memo: memo})
	_, err := c.Score(context.Background(), texts)
	require.ErrorIs(t, err, ErrBudget)
	assert.Equal(t, 2, up.Calls().Total(), "no call is sent after the refusal")
	kept := memo.Answers()
	require.Len(t, kept, 1, "the answer in flight is kept")

	up.Reset()
	again := NewMemo()
	again.Give(kept)
	res, err := newClient(t, Options{BaseURL: up.URL(), Model: upstreamtest.ModelSmall, BatchSize: 1, Concurrency: 2, Memo: again}).Score(context.Background(), texts)
	require.NoError(t, err)
	assert.Equal(t, 2, up.Calls().Total(), "the kept answer is taken, not asked for again")
	require.Len(t, res.Calls, 3)
	found := false
	for i, text := range texts {
		if AnswerKey([]string{text}) == kept[0].Key {
			found = true
			assert.Equal(t, kept[0].Call, res.Calls[i], "the kept call's figures come back")
			assert.Equal(t, kept[0].Top[0], res.Top[i])
		}
	}
	assert.True(t, found, "the kept answer is for one of the texts")
	assert.Len(t, again.Answers(), 3, "the memo keeps every call answered, the given one included")
}

// TestMemoGivesInOrder: answers given for one key come back first in,
// first out, and the ones not taken yet are still carried.
func TestMemoGivesInOrder(t *testing.T) {
	m := NewMemo()
	k := AnswerKey([]string{"a"})
	m.Give([]Answer{{Key: k, Call: Call{Prompts: 1, CostUSD: 1}}, {Key: k, Call: Call{Prompts: 1, CostUSD: 0}}, {Key: AnswerKey([]string{"b"})}})
	a, ok := m.take(k)
	require.True(t, ok)
	assert.Equal(t, 1.0, a.Call.CostUSD, "the first given comes first")
	m.Mark()
	left := m.Answers()
	require.Len(t, left, 2, "the answers not taken are carried")
	assert.NotEqual(t, AnswerKey([]string{"a"}), AnswerKey([]string{"", "a"}), "keys tell the texts apart")
	assert.NotEqual(t, AnswerKey([]string{"ab"}), AnswerKey([]string{"a", "b"}))
}
