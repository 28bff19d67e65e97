package reward

import (
	"fmt"
	"math"
)

// Step is the reward of one search step: P prompts, each scored on the same
// N inputs.
type Step struct {
	// Rewards[p][i] is prompt p's reward on input i after the z-score and
	// scaling.
	Rewards [][]float64
	// Raw[p][i] is the same before the z-score and scaling (λ·Gap).
	Raw [][]float64
	// PerPrompt[p] is the mean of Rewards[p]: the prompt's reward for the
	// policy.
	PerPrompt []float64
	// Accuracy[p] is the share of inputs prompt p classified correctly.
	Accuracy []float64
	// Lookups counts verbalizer look-ups (P × N × labels); Floored counts
	// those that fell back to the floor because the answer's top-k list did
	// not hold the verbalizer.
	Lookups, Floored int
}

// Score computes a step's rewards. top[p][i] is the next-token
// log-probability map the model gave for prompt p on input i, truth[i] the
// index of input i's true label in verbalizers. Every prompt must have one
// map per input.
func (c Config) Score(top [][]map[string]float64, truth []int, verbalizers []string) (Step, error) {
	if err := c.Validate(); err != nil {
		return Step{}, err
	}
	s := Step{Raw: make([][]float64, len(top)), Accuracy: make([]float64, len(top))}
	for p, row := range top {
		if len(row) != len(truth) {
			return Step{}, fmt.Errorf("%w: prompt %d has %d answers for %d inputs", ErrShape, p, len(row), len(truth))
		}
		s.Raw[p] = make([]float64, len(row))
		right := 0
		for i, lps := range row {
			probs, floored, err := c.Probabilities(lps, verbalizers)
			if err != nil {
				return Step{}, fmt.Errorf("prompt %d, input %d: %w", p, i, err)
			}
			j, err := Judge(probs, truth[i])
			if err != nil {
				return Step{}, fmt.Errorf("prompt %d, input %d: %w", p, i, err)
			}
			s.Lookups += len(verbalizers)
			s.Floored += floored
			s.Raw[p][i] = c.Raw(j)
			if j.Correct {
				right++
			}
		}
		if len(row) > 0 {
			s.Accuracy[p] = float64(right) / float64(len(row))
		}
	}
	s.Rewards = c.Normalize(s.Raw)
	s.PerPrompt = make([]float64, len(s.Rewards))
	for p, row := range s.Rewards {
		s.PerPrompt[p] = mean(row)
	}
	return s, nil
}

// Normalize z-scores each input's column of raw[p][i] across the prompts p
// (population standard deviation plus StdEpsilon) for KindGap, or centres
// it (subtracts its mean) for KindMargin, unless NoZScore; then it
// multiplies by Factor and clips to ±Clip when Clip is set. raw is not
// modified; rows must have equal lengths.
func (c Config) Normalize(raw [][]float64) [][]float64 {
	out := make([][]float64, len(raw))
	for p := range raw {
		out[p] = append([]float64(nil), raw[p]...)
	}
	if len(out) == 0 {
		return out
	}
	if !c.NoZScore {
		col := make([]float64, len(out))
		for i := range out[0] {
			for p := range out {
				col[p] = out[p][i]
			}
			m := mean(col)
			var ss float64
			for _, v := range col {
				ss += (v - m) * (v - m)
			}
			std := math.Sqrt(ss/float64(len(col))) + StdEpsilon
			if c.Kind == KindMargin {
				std = 1
			}
			for p := range out {
				out[p][i] = (out[p][i] - m) / std
			}
		}
	}
	f := c.factor()
	for p := range out {
		for i, v := range out[p] {
			v *= f
			if c.Clip > 0 {
				v = max(-c.Clip, min(c.Clip, v))
			}
			out[p][i] = v
		}
	}
	return out
}

func mean(xs []float64) float64 {
	if len(xs) == 0 {
		return 0
	}
	var s float64
	for _, x := range xs {
		s += x
	}
	return s / float64(len(xs))
}
