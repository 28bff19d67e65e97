package policy

import (
	"context"
	"fmt"
	"math"
	"math/rand/v2"
)

// PCG stream constants: initialisation and sampling draw from separate
// streams of the same seed, so sampling does not depend on the network size.
const (
	initStream   = 0x706f6c6963792d69 // "policy-i"
	sampleStream = 0x706f6c6963792d73 // "policy-s"
)

// initLastScale is the last layer's initial standard deviation times
// √Hidden: small enough that the initial Q values are within about 10⁻² of
// zero (a near-uniform policy), large enough that they are not all equal.
const initLastScale = 1e-3

// Trainer holds a policy network, its target copy and optimiser state, and
// trains it by soft Q-learning on batches of scored prompts (see the
// package doc for the model and losses). Its zero value is not usable; make
// one with NewTrainer or Load. A Trainer is not safe for concurrent use.
type Trainer struct {
	b   Backbone
	cfg Config
	net qnet
	// index maps a token id to its position in cfg.Actions.
	index map[int]int

	params, target []float64
	opt            adam
	pcg            *rand.PCG
	rng            *rand.Rand
}

// Stats describes one Update.
type Stats struct {
	// Step is the number of updates done, this one included.
	Step int
	// Loss is the minimised loss, the mean of SingleLoss and MultiLoss.
	Loss float64
	// SingleLoss and MultiLoss are the means of ½δ² over the batch's
	// (prompt, step) pairs for the single- and multi-step residuals.
	SingleLoss, MultiLoss float64
	// GradNorm is the gradient's global L2 norm before clipping; Clipped
	// says whether it was scaled down.
	GradNorm float64
	Clipped  bool
	// MeanReward and MaxReward summarise the batch's rewards.
	MeanReward, MaxReward float64
	// Entropy is the policy's mean entropy (nats) over the batch's states,
	// before the update.
	Entropy float64
}

// NewTrainer returns a trainer over backbone b. The MLP's weights are drawn
// with cfg.Seed: W₁ from N(0, 1/D), W₂ from N(0, 10⁻⁶/Hidden), biases zero
// (see the package doc), so the initial policy is near uniform.
func NewTrainer(b Backbone, cfg Config) (*Trainer, error) {
	rows, cols, data := b.OutputHead()
	if rows < 1 || cols < 1 || len(data) != rows*cols {
		return nil, fmt.Errorf("%w: output head is %d×%d with %d values", ErrBackbone, rows, cols, len(data))
	}
	cfg, err := cfg.withDefaults(rows)
	if err != nil {
		return nil, err
	}
	t := newTrainer(b, cfg, cols, data)
	w1, _, w2, _ := t.net.split(t.params)
	init := rand.New(rand.NewPCG(cfg.Seed, initStream))
	scale := 1 / math.Sqrt(float64(cols))
	for i := range w1 {
		w1[i] = init.NormFloat64() * scale
	}
	scale = initLastScale / math.Sqrt(float64(cfg.Hidden))
	for i := range w2 {
		w2[i] = init.NormFloat64() * scale
	}
	copy(t.target, t.params)
	return t, nil
}

// newTrainer builds a trainer with zero parameters for a validated config;
// head is the backbone's rows × cols head.
func newTrainer(b Backbone, cfg Config, cols int, head []float32) *Trainer {
	t := &Trainer{
		b:     b,
		cfg:   cfg,
		net:   qnet{dim: cols, hidden: cfg.Hidden, actions: len(cfg.Actions)},
		index: make(map[int]int, len(cfg.Actions)),
	}
	t.net.head = make([]float64, len(cfg.Actions)*cols)
	for i, id := range cfg.Actions {
		t.index[id] = i
		for j, v := range head[id*cols : (id+1)*cols] {
			t.net.head[i*cols+j] = float64(v)
		}
	}
	n := t.net.size()
	t.params = make([]float64, n)
	t.target = make([]float64, n)
	t.opt = newAdam(n)
	t.pcg = rand.NewPCG(cfg.Seed, sampleStream)
	t.rng = rand.New(t.pcg)
	return t
}

// Config returns the trainer's configuration with defaults filled in.
func (t *Trainer) Config() Config {
	c := t.cfg
	c.Actions = append([]int(nil), c.Actions...)
	return c
}

// Step returns the number of updates done.
func (t *Trainer) Step() int { return t.opt.t }

// QValues returns Q(s, ·) over Config().Actions for the state s = prompt
// (a prefix of a prompt; empty for the start state), from the trained
// network.
func (t *Trainer) QValues(ctx context.Context, prompt []int) ([]float64, error) {
	tr := t.net.newTrace()
	if err := t.eval(ctx, t.params, prompt, tr); err != nil {
		return nil, err
	}
	return tr.q, nil
}

// eval runs network p on the state prompt, filling tr.
func (t *Trainer) eval(ctx context.Context, p []float64, prompt []int, tr *trace) error {
	if err := t.hidden(ctx, prompt, tr.h); err != nil {
		return err
	}
	t.net.forward(p, tr)
	return nil
}

// hidden writes the backbone's hidden state for prompt to dst.
func (t *Trainer) hidden(ctx context.Context, prompt []int, dst []float64) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	h, err := t.b.Hidden(ctx, prompt)
	if err != nil {
		return fmt.Errorf("policy: backbone hidden state of %d-token prompt: %w", len(prompt), err)
	}
	if len(h) != len(dst) {
		return fmt.Errorf("%w: hidden state has %d values, head has %d columns", ErrBackbone, len(h), len(dst))
	}
	for i, v := range h {
		dst[i] = float64(v)
	}
	return nil
}

// Sample draws n prompts (token ids) from the current policy, each token
// from the softmax of the TopK largest Q values at its state.
func (t *Trainer) Sample(ctx context.Context, n int) ([][]int, error) {
	return t.decode(ctx, n, true)
}

// Greedy returns the prompt that takes the largest Q value at every step
// (the first action on ties). It uses no randomness.
func (t *Trainer) Greedy(ctx context.Context) ([]int, error) {
	p, err := t.decode(ctx, 1, false)
	if err != nil {
		return nil, err
	}
	return p[0], nil
}

func (t *Trainer) decode(ctx context.Context, n int, sample bool) ([][]int, error) {
	if n < 0 {
		return nil, fmt.Errorf("policy: cannot sample %d prompts", n)
	}
	tr := t.net.newTrace()
	idx := make([]int, 0, t.net.actions)
	w := make([]float64, t.cfg.TopK)
	out := make([][]int, n)
	for i := range out {
		prompt := make([]int, 0, t.cfg.PromptLength)
		for range t.cfg.PromptLength {
			if err := t.eval(ctx, t.params, prompt, tr); err != nil {
				return nil, err
			}
			a := argmax(tr.q)
			if sample {
				a = sampleTopK(t.rng, tr.q, t.cfg.TopK, idx, w)
			}
			prompt = append(prompt, t.cfg.Actions[a])
		}
		out[i] = prompt
	}
	return out, nil
}
