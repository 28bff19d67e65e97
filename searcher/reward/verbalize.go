package reward

import (
	"fmt"
	"math"
)

// Probabilities returns the verbalizers' probabilities renormalised over the
// verbalizers, read from top, the next token's log-probabilities keyed by
// token string as the API names them. A verbalizer missing from top gets
// the floor (see Config.Floor); floored counts how many did. A top with no
// entries at all is ErrNoLogprobs.
//
// The renormalisation is done in log space (subtracting the largest
// log-probability first), so very negative log-probabilities do not
// underflow to a division by zero.
func (c Config) Probabilities(top map[string]float64, verbalizers []string) (probs []float64, floored int, err error) {
	if len(top) == 0 {
		return nil, 0, ErrNoLogprobs
	}
	floor := c.Floor
	if floor == 0 {
		lowest := math.Inf(1)
		for _, lp := range top {
			lowest = min(lowest, lp)
		}
		floor = lowest - math.Ln2
	}
	lps := make([]float64, len(verbalizers))
	maxLP := math.Inf(-1)
	for i, v := range verbalizers {
		lp, ok := top[v]
		if !ok {
			lp = floor
			floored++
		}
		if math.IsNaN(lp) || lp > 0 {
			return nil, 0, fmt.Errorf("reward: verbalizer %q has log-probability %v, want <= 0", v, lp)
		}
		lps[i] = lp
		maxLP = max(maxLP, lp)
	}
	var sum float64
	probs = make([]float64, len(lps))
	for i, lp := range lps {
		probs[i] = math.Exp(lp - maxLP)
		sum += probs[i]
	}
	for i := range probs {
		probs[i] /= sum
	}
	return probs, floored, nil
}

// Judgement is one input's verdict under one prompt.
type Judgement struct {
	// Pred is the index of the most probable label (the first on ties).
	Pred int
	// Gap is P(true) − the largest P(other), in [−1, 1].
	Gap float64
	// Correct reports whether Pred is the true label and no other label
	// ties with it (a tie has Gap 0 and counts as wrong).
	Correct bool
}

// Judge compares the true label's probability with the others'. probs must
// hold at least two labels and truth must index it.
func Judge(probs []float64, truth int) (Judgement, error) {
	if len(probs) < 2 || truth < 0 || truth >= len(probs) {
		return Judgement{}, fmt.Errorf("%w: label %d of %d probabilities", ErrShape, truth, len(probs))
	}
	j := Judgement{}
	other := math.Inf(-1)
	for i, p := range probs {
		if p > probs[j.Pred] {
			j.Pred = i
		}
		if i != truth {
			other = max(other, p)
		}
	}
	j.Gap = probs[truth] - other
	j.Correct = j.Gap > 0
	if j.Correct {
		j.Pred = truth
	}
	return j, nil
}

// Raw is the unnormalised reward for one judgement: for KindGap the
// paper's Correct·Gap when right and Wrong·Gap when wrong; for KindMargin
// ±1 plus Margin·Gap.
func (c Config) Raw(j Judgement) float64 {
	if c.Kind == KindMargin {
		if j.Correct {
			return 1 + c.margin()*j.Gap
		}
		return -1 + c.margin()*j.Gap
	}
	if j.Correct {
		return c.correct() * j.Gap
	}
	return c.wrong() * j.Gap
}
