package search

import (
	"context"

	"github.com/stintlab/stint/proxy/localmodel/tokenizer"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/task"
)

// Trainer adapts a *policy.Trainer to Policy.
type Trainer struct{ *policy.Trainer }

// Update runs one soft Q-learning step.
func (t Trainer) Update(ctx context.Context, prompts [][]int, rewards []float64) (PolicyStats, error) {
	s, err := t.Trainer.Update(ctx, prompts, rewards)
	return PolicyStats{Loss: s.Loss, MeanReward: s.MeanReward}, err
}

// LocalVocab is the vocabulary of the local backbone's tokenizer,
// restricted by a task's allow-list.
type LocalVocab struct {
	tok     *tokenizer.Tokenizer
	actions []int
}

// NewLocalVocab lists tok's tokens that allow admits. Token text is the
// token's bytes, leading space included, as the allow-list expects.
func NewLocalVocab(tok *tokenizer.Tokenizer, allow task.AllowList) *LocalVocab {
	v := &LocalVocab{tok: tok}
	for id := range tok.Len() {
		if id == tok.BOS() || id == tok.EOS() || tok.Type(id) != tokenizer.TypeNormal {
			continue
		}
		if allow.Allowed(string(tok.Bytes(id))) {
			v.actions = append(v.actions, id)
		}
	}
	return v
}

// Actions implements Vocabulary.
func (v *LocalVocab) Actions() []int { return v.actions }

// Text implements Vocabulary.
func (v *LocalVocab) Text(ids []int) string {
	pieces := make([]string, len(ids))
	for i, id := range ids {
		pieces[i] = string(v.tok.Bytes(id))
	}
	return PromptText(pieces)
}
