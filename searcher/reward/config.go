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
)

// Config sets the reward's constants. The zero value of every field selects
// its default, so Config{} is the paper's reward, z-scored, unscaled.
type Config struct {
	// Correct multiplies Gap when the prediction is right (λ2); 0 means
	// DefaultCorrect.
	Correct float64
	// Wrong multiplies Gap when the prediction is wrong (λ1); 0 means
	// DefaultWrong.
	Wrong float64
	// NoZScore skips the per-input z-score across a step's prompts (false,
	// the default, z-scores as the paper does).
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
