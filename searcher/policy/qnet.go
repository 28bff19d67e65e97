package policy

import (
	"math"

	"gonum.org/v1/gonum/floats"
)

// qnet is the Q network's shape and frozen head: Q(s,·) = head · f(h(s))
// with f(h) = W₂·gelu(W₁·h + b₁) + b₂. Its parameters live in one flat
// slice (see split) so the optimiser, Polyak averaging and checkpoints treat
// them as a single vector. A qnet is read-only after construction.
type qnet struct {
	dim, hidden, actions int
	// head holds the backbone head's rows for the action set, actions × dim.
	head []float64
}

// size is the number of parameters.
func (n *qnet) size() int { return 2*n.hidden*n.dim + n.hidden + n.dim }

// split returns the views W₁ (hidden × dim), b₁, W₂ (dim × hidden), b₂ of a
// flat parameter (or gradient) vector.
func (n *qnet) split(p []float64) (w1, b1, w2, b2 []float64) {
	h, d := n.hidden, n.dim
	w1, p = p[:h*d], p[h*d:]
	b1, p = p[:h], p[h:]
	w2, p = p[:d*h], p[d*h:]
	return w1, b1, w2, p[:d]
}

// trace is one state's forward pass, kept for the backward pass.
type trace struct {
	h, z1, a1, f, q []float64
}

func (n *qnet) newTrace() *trace {
	return &trace{
		h:  make([]float64, n.dim),
		z1: make([]float64, n.hidden),
		a1: make([]float64, n.hidden),
		f:  make([]float64, n.dim),
		q:  make([]float64, n.actions),
	}
}

// forward computes tr.q from the input already in tr.h.
func (n *qnet) forward(p []float64, tr *trace) {
	w1, b1, w2, b2 := n.split(p)
	d, h := n.dim, n.hidden
	for i := range h {
		z := b1[i] + dot(w1[i*d:(i+1)*d], tr.h)
		tr.z1[i] = z
		tr.a1[i] = gelu(z)
	}
	for j := range d {
		tr.f[j] = b2[j] + dot(w2[j*h:(j+1)*h], tr.a1)
	}
	for a := range n.actions {
		tr.q[a] = dot(n.head[a*d:(a+1)*d], tr.f)
	}
}

// backward adds to grad (a flat vector like p) the gradient of a loss whose
// gradient with respect to tr.q is gq. gf and ga are scratch of dim and
// hidden values.
func (n *qnet) backward(p []float64, tr *trace, gq, grad, gf, ga []float64) {
	_, _, w2, _ := n.split(p)
	gw1, gb1, gw2, gb2 := n.split(grad)
	d, h := n.dim, n.hidden
	clear(gf)
	for a, g := range gq {
		if g != 0 {
			axpy(gf, g, n.head[a*d:(a+1)*d])
		}
	}
	clear(ga)
	for j, g := range gf {
		gb2[j] += g
		axpy(gw2[j*h:(j+1)*h], g, tr.a1)
		axpy(ga, g, w2[j*h:(j+1)*h])
	}
	for i, g := range ga {
		g *= geluGrad(tr.z1[i])
		gb1[i] += g
		axpy(gw1[i*d:(i+1)*d], g, tr.h)
	}
}

// gelu is the exact GELU, x·Φ(x).
func gelu(x float64) float64 { return 0.5 * x * (1 + math.Erf(x/math.Sqrt2)) }

// geluGrad is d gelu/dx = Φ(x) + x·φ(x).
func geluGrad(x float64) float64 {
	return 0.5*(1+math.Erf(x/math.Sqrt2)) + x*math.Exp(-0.5*x*x)/math.Sqrt(2*math.Pi)
}

// dot is the inner product of a and b[:len(a)] (gonum's vectorised kernel).
func dot(a, b []float64) float64 { return floats.Dot(a, b[:len(a)]) }

// axpy does y += alpha·x[:len(y)].
func axpy(y []float64, alpha float64, x []float64) { floats.AddScaled(y, alpha, x[:len(y)]) }
