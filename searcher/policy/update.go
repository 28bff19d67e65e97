package policy

import (
	"context"
	"fmt"
	"math"
)

// Update takes one soft Q-learning step on a batch: prompts[i] (exactly
// PromptLength tokens from the action set) earned rewards[i]. It computes
// the loss of the package doc over the whole batch, clips the gradient,
// takes one Adam step and moves the target network. The prompts need not
// come from Sample (off-policy data is allowed by the losses' form, though
// the method is meant to be used on-policy). On error nothing changes.
func (t *Trainer) Update(ctx context.Context, prompts [][]int, rewards []float64) (Stats, error) {
	acts, err := t.checkBatch(prompts, rewards)
	if err != nil {
		return Stats{}, err
	}
	grad := make([]float64, t.net.size())
	sum, err := t.lossGrad(ctx, t.params, prompts, acts, rewards, grad)
	if err != nil {
		return Stats{}, err
	}
	n := float64(len(prompts) * t.cfg.PromptLength)
	st := Stats{
		SingleLoss: sum.single / n,
		MultiLoss:  sum.multi / n,
		Entropy:    sum.entropy / n,
		MaxReward:  math.Inf(-1),
	}
	st.Loss = (st.SingleLoss + st.MultiLoss) / 2
	for _, r := range rewards {
		st.MeanReward += r
		st.MaxReward = max(st.MaxReward, r)
	}
	st.MeanReward /= float64(len(rewards))
	st.GradNorm = clipNorm(grad, t.cfg.ClipNorm)
	st.Clipped = t.cfg.ClipNorm > 0 && st.GradNorm > t.cfg.ClipNorm
	t.opt.step(t.params, grad, t.cfg.LearningRate)
	polyak(t.target, t.params, t.cfg.Polyak)
	st.Step = t.opt.t
	return st, nil
}

// checkBatch validates a batch and returns each prompt's action indices.
func (t *Trainer) checkBatch(prompts [][]int, rewards []float64) ([][]int, error) {
	if len(prompts) == 0 || len(prompts) != len(rewards) {
		return nil, fmt.Errorf("%w: %d prompts and %d rewards", ErrBatch, len(prompts), len(rewards))
	}
	acts := make([][]int, len(prompts))
	for i, p := range prompts {
		if len(p) != t.cfg.PromptLength {
			return nil, fmt.Errorf("%w: prompt %d has %d tokens, want %d", ErrBatch, i, len(p), t.cfg.PromptLength)
		}
		if math.IsNaN(rewards[i]) || math.IsInf(rewards[i], 0) {
			return nil, fmt.Errorf("%w: reward %d is %v", ErrBatch, i, rewards[i])
		}
		acts[i] = make([]int, len(p))
		for s, id := range p {
			a, ok := t.index[id]
			if !ok {
				return nil, fmt.Errorf("%w: prompt %d token %d (id %d) is not an allowed action", ErrBatch, i, s, id)
			}
			acts[i][s] = a
		}
	}
	return acts, nil
}

// lossSums are a batch's sums over (prompt, step) pairs.
type lossSums struct {
	single, multi, entropy float64
}

// lossGrad evaluates network p on a checked batch (acts from checkBatch)
// against the current target network, adds the gradient of the loss to
// grad and returns the loss terms' sums.
func (t *Trainer) lossGrad(ctx context.Context, p []float64, prompts, acts [][]int, rewards []float64, grad []float64) (lossSums, error) {
	L := t.cfg.PromptLength
	gf, ga := make([]float64, t.net.dim), make([]float64, t.net.hidden)
	pi := make([]float64, t.net.actions)
	tbar := t.net.newTrace()
	traces := make([]*trace, L)
	q := make([][]float64, L)
	gq := make([][]float64, L)
	for s := range traces {
		traces[s] = t.net.newTrace()
		q[s] = traces[s].q
		gq[s] = make([]float64, t.net.actions)
	}
	vbar := make([]float64, L)
	var sum lossSums
	scale := 1 / float64(2*len(prompts)*L)
	for i, prompt := range prompts {
		for s := range L {
			tr := traces[s]
			if err := t.hidden(ctx, prompt[:s], tr.h); err != nil {
				return lossSums{}, err
			}
			t.net.forward(p, tr)
			copy(tbar.h, tr.h)
			t.net.forward(t.target, tbar)
			vbar[s] = logSumExp(tbar.q)
		}
		ls, lm, e := episodeLoss(q, vbar, acts[i], rewards[i], gq, pi)
		sum.single += ls
		sum.multi += lm
		sum.entropy += e
		for s, tr := range traces {
			for a := range gq[s] {
				gq[s][a] *= scale
			}
			t.net.backward(p, tr, gq[s], grad, gf, ga)
		}
	}
	return sum, nil
}
