package policy

import (
	"fmt"
	"math"
)

// Defaults for the zero values of Config's fields.
const (
	DefaultPromptLength = 5
	DefaultHidden       = 256
	DefaultTopK         = 256
	DefaultLearningRate = 1e-3
	DefaultPolyak       = 0.001
	DefaultClipNorm     = 5
)

// Config sets up a Trainer. The zero value of every field selects its
// default; NewTrainer copies the Config before filling defaults.
type Config struct {
	// PromptLength is L, the number of tokens in every prompt; 0 means 5.
	PromptLength int
	// Hidden is the MLP's inner width; 0 means 256.
	Hidden int
	// TopK is how many of the largest Q values Sample draws from; 0 means
	// 256. It is capped at the number of actions.
	TopK int
	// LearningRate is Adam's step size; 0 means 1e-3 (a starting point,
	// not a tuned value).
	LearningRate float64
	// Polyak is τ in θ̄ ← (1−τ)θ̄ + τθ, in (0, 1]; 0 means 0.001.
	Polyak float64
	// ClipNorm bounds the gradient's global L2 norm; 0 means 5, −1 turns
	// clipping off.
	ClipNorm float64
	// Seed seeds parameter initialisation and sampling (0 is a seed like
	// any other).
	Seed uint64
	// Actions is the allow-list of token ids the policy may emit, in the
	// order ties are broken; nil means the whole vocabulary in id order.
	// Ids must be distinct and inside the vocabulary.
	Actions []int
}

// withDefaults returns a copy of c with defaults filled in and Actions
// copied (or listed in full for a vocabulary of vocab tokens), or an error
// wrapping ErrConfig naming the bad field.
func (c Config) withDefaults(vocab int) (Config, error) {
	def := func(v *int, d int) {
		if *v == 0 {
			*v = d
		}
	}
	def(&c.PromptLength, DefaultPromptLength)
	def(&c.Hidden, DefaultHidden)
	def(&c.TopK, DefaultTopK)
	if c.LearningRate == 0 {
		c.LearningRate = DefaultLearningRate
	}
	if c.Polyak == 0 {
		c.Polyak = DefaultPolyak
	}
	if c.ClipNorm == 0 {
		c.ClipNorm = DefaultClipNorm
	}
	switch {
	case c.PromptLength < 0:
		return c, fmt.Errorf("%w: PromptLength %d is negative", ErrConfig, c.PromptLength)
	case c.Hidden < 0:
		return c, fmt.Errorf("%w: Hidden %d is negative", ErrConfig, c.Hidden)
	case c.TopK < 0:
		return c, fmt.Errorf("%w: TopK %d is negative", ErrConfig, c.TopK)
	case !(c.LearningRate > 0) || math.IsInf(c.LearningRate, 0):
		return c, fmt.Errorf("%w: LearningRate %v is not a positive number", ErrConfig, c.LearningRate)
	case !(c.Polyak > 0 && c.Polyak <= 1):
		return c, fmt.Errorf("%w: Polyak %v is outside (0, 1]", ErrConfig, c.Polyak)
	case c.ClipNorm != -1 && (!(c.ClipNorm > 0) || math.IsInf(c.ClipNorm, 0)):
		return c, fmt.Errorf("%w: ClipNorm %v is neither positive nor -1", ErrConfig, c.ClipNorm)
	}
	if c.Actions == nil {
		c.Actions = make([]int, vocab)
		for i := range c.Actions {
			c.Actions[i] = i
		}
	} else {
		c.Actions = append([]int(nil), c.Actions...)
	}
	if len(c.Actions) == 0 {
		return c, fmt.Errorf("%w: Actions is empty", ErrConfig)
	}
	seen := make(map[int]bool, len(c.Actions))
	for i, id := range c.Actions {
		if id < 0 || id >= vocab {
			return c, fmt.Errorf("%w: Actions[%d] = %d is outside the vocabulary of %d", ErrConfig, i, id, vocab)
		}
		if seen[id] {
			return c, fmt.Errorf("%w: Actions[%d] = %d is repeated", ErrConfig, i, id)
		}
		seen[id] = true
	}
	c.TopK = min(c.TopK, len(c.Actions))
	return c, nil
}
