package policy

import (
	"math"
	"math/rand/v2"
	"slices"
)

// topK returns the indices of the k largest values of q, ties going to the
// smaller index: sorted largest first when k < len(q), all indices in order
// when k = len(q). idx is reused as storage.
func topK(q []float64, k int, idx []int) []int {
	idx = idx[:0]
	for i := range q {
		idx = append(idx, i)
	}
	if k < len(q) {
		slices.SortFunc(idx, func(a, b int) int {
			switch {
			case q[a] > q[b]:
				return -1
			case q[a] < q[b]:
				return 1
			}
			return a - b
		})
	}
	return idx[:k]
}

// sampleTopK draws an index of q from the softmax of its k largest values.
// w is scratch of at least k values.
func sampleTopK(rng *rand.Rand, q []float64, k int, idx []int, w []float64) int {
	top := topK(q, k, idx)
	m := math.Inf(-1)
	for _, a := range top {
		m = max(m, q[a])
	}
	var sum float64
	for i, a := range top {
		w[i] = math.Exp(q[a] - m)
		sum += w[i]
	}
	u := rng.Float64() * sum
	for i, a := range top {
		u -= w[i]
		if u < 0 {
			return a
		}
	}
	return top[len(top)-1] // u ≥ sum only through rounding
}

// argmax returns the index of the largest value, the first on ties.
func argmax(q []float64) int {
	best := 0
	for i, v := range q {
		if v > q[best] {
			best = i
		}
	}
	return best
}
