package policy

import "math"

// logSumExp returns log Σ exp(x), computed stably.
func logSumExp(x []float64) float64 {
	m := math.Inf(-1)
	for _, v := range x {
		m = max(m, v)
	}
	if math.IsInf(m, 0) {
		return m
	}
	var s float64
	for _, v := range x {
		s += math.Exp(v - m)
	}
	return m + math.Log(s)
}

// softmaxInto writes softmax(x) to p (len(x)) and returns log Σ exp(x).
func softmaxInto(p, x []float64) float64 {
	lse := logSumExp(x)
	for i, v := range x {
		p[i] = math.Exp(v - lse)
	}
	return lse
}

// entropy returns −Σ p log p.
func entropy(p []float64) float64 {
	var h float64
	for _, v := range p {
		if v > 0 {
			h -= v * math.Log(v)
		}
	}
	return h
}
