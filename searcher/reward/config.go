package reward

import (
	"fmt"
	"math"
)

// The paper's constants (Deng et al. 2022, arXiv 2205.12548: λ1 = 180 for a
// wrong answer, λ2 = 200 for a correct one).
const (
	// DefaultCorrect is λ2, the multiplier of Gap when the argmax is the
	// true label.
	DefaultCorrect = 200
	// DefaultWrong is λ1, the multiplier of Gap when it is not.
	DefaultWrong = 180
	// StdEpsilon is added to the population standard deviation before
	// dividing, so a column of equal rewards gives zeros, not NaN.
	StdEpsilon = 1e-4
	// DefaultMargin is the weight of Gap in the margin reward.
	DefaultMargin = 0.5
)

// Kind names a reward.
type Kind string

// The rewards.
const (
	// KindGap is the published reward (Deng et al. 2022): λ2·Gap when the
	// answer is right, λ1·Gap when it is wrong, z-scored per input across
	// a step's prompts.
	KindGap Kind = "gap"
	// KindMargin scores a right answer +1 and a wrong one −1, plus
	// Margin·Gap, and centres each input's rewards across a step's prompts
	// (no division). A prompt's mean is then accuracy, rescaled, plus a
	// margin term that tells apart prompts of equal accuracy, so the
	// policy learns what the search is judged on. Gap alone tracks
	// accuracy loosely on tasks where prompts shift the model's bias
	// between labels more than its reading of the line; the per-input
	// z-score then blows up inputs on which all prompts agree.
	KindMargin Kind = "margin"
)

// Config sets the reward's constants. The zero value of every field selects
// its default, so Config{} is the paper's reward, z-scored, unscaled.
type Config struct {
	// Kind selects the reward; "" means KindGap.
	Kind Kind
	// Margin weighs Gap in KindMargin; 0 means DefaultMargin.
	Margin float64
	// Correct multiplies Gap when the prediction is right (λ2); 0 means
	// DefaultCorrect.
	Correct float64
	// Wrong multiplies Gap when the prediction is wrong (λ1); 0 means
	// DefaultWrong.
	Wrong float64
	// NoZScore skips the per-input normalisation across a step's prompts:
	// the z-score of KindGap (false, the default, z-scores as the paper
	// does), the centring of KindMargin.
	NoZScore bool
	// Factor multiplies each reward after the z-score; 0 means 1.
	Factor float64
	// Clip, when positive, bounds each scaled reward to [−Clip, Clip]; 0
	// means no clip.
	Clip float64
	// Floor is the log-probability given to a verbalizer that the answer's
	// top-k list does not hold. 0 means "the lowest log-probability returned
	// minus ln 2" (a missing token is at most as likely as the least likely
	// one returned, since the list holds the k most likely; halving that is a
	// guess below the bound). A negative value is used as it is.
	Floor float64
}

// Validate reports a field set to a value the reward cannot use.
func (c Config) Validate() error {
	switch {
	case c.Kind != "" && c.Kind != KindGap && c.Kind != KindMargin:
		return fmt.Errorf("%w: kind must be %q or %q, got %q", ErrConfig, KindMargin, KindGap, c.Kind)
	case c.Kind == KindMargin && (c.Correct != 0 || c.Wrong != 0):
		return fmt.Errorf("%w: correct and wrong are constants of the %q reward, not of %q", ErrConfig, KindGap, KindMargin)
	case c.Margin < 0 || math.IsNaN(c.Margin) || math.IsInf(c.Margin, 0):
		return fmt.Errorf("%w: margin must be positive, got %v", ErrConfig, c.Margin)
	case c.Correct < 0 || math.IsNaN(c.Correct) || math.IsInf(c.Correct, 0):
		return fmt.Errorf("%w: correct must be positive, got %v", ErrConfig, c.Correct)
	case c.Wrong < 0 || math.IsNaN(c.Wrong) || math.IsInf(c.Wrong, 0):
		return fmt.Errorf("%w: wrong must be positive, got %v", ErrConfig, c.Wrong)
	case c.Factor < 0 || math.IsNaN(c.Factor) || math.IsInf(c.Factor, 0):
		return fmt.Errorf("%w: factor must be positive, got %v", ErrConfig, c.Factor)
	case c.Clip < 0 || math.IsNaN(c.Clip) || math.IsInf(c.Clip, 0):
		return fmt.Errorf("%w: clip must be positive (or 0 for none), got %v", ErrConfig, c.Clip)
	case c.Floor > 0 || math.IsNaN(c.Floor) || math.IsInf(c.Floor, 0):
		return fmt.Errorf("%w: floor must be a negative log-probability (or 0 for the default), got %v", ErrConfig, c.Floor)
	}
	return nil
}

// margin returns Margin with its default filled in.
func (c Config) margin() float64 { return orDefault(c.Margin, DefaultMargin) }

// correct returns λ2 with its default filled in.
func (c Config) correct() float64 { return orDefault(c.Correct, DefaultCorrect) }

// wrong returns λ1 with its default filled in.
func (c Config) wrong() float64 { return orDefault(c.Wrong, DefaultWrong) }

// factor returns the scale factor with its default filled in.
func (c Config) factor() float64 { return orDefault(c.Factor, 1) }

func orDefault(v, def float64) float64 {
	if v == 0 {
		return def
	}
	return v
}
