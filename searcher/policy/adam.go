package policy

import "math"

// Adam's fixed constants (Kingma and Ba 2015, the paper's defaults).
const (
	adamBeta1 = 0.9
	adamBeta2 = 0.999
	adamEps   = 1e-8
)

// adam is the Adam optimiser's state for one flat parameter vector.
type adam struct {
	m, v []float64
	// t is the number of steps taken.
	t int
}

func newAdam(n int) adam { return adam{m: make([]float64, n), v: make([]float64, n)} }

// step applies one bias-corrected Adam update with step size lr to p.
func (o *adam) step(p, grad []float64, lr float64) {
	o.t++
	c1 := 1 - math.Pow(adamBeta1, float64(o.t))
	c2 := 1 - math.Pow(adamBeta2, float64(o.t))
	for i, g := range grad {
		o.m[i] = adamBeta1*o.m[i] + (1-adamBeta1)*g
		o.v[i] = adamBeta2*o.v[i] + (1-adamBeta2)*g*g
		p[i] -= lr * (o.m[i] / c1) / (math.Sqrt(o.v[i]/c2) + adamEps)
	}
}

// clipNorm scales grad so its L2 norm is at most limit (limit −1: never)
// and returns the norm before scaling.
func clipNorm(grad []float64, limit float64) float64 {
	var s float64
	for _, g := range grad {
		s += g * g
	}
	norm := math.Sqrt(s)
	if limit > 0 && norm > limit {
		k := limit / norm
		for i := range grad {
			grad[i] *= k
		}
	}
	return norm
}

// polyak moves target toward p: target ← (1−tau)·target + tau·p.
func polyak(target, p []float64, tau float64) {
	for i, v := range p {
		target[i] = (1-tau)*target[i] + tau*v
	}
}
