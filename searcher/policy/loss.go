package policy

// episodeLoss evaluates one prompt's soft Q-learning residuals (see the
// package doc) and their gradient.
//
// q[t] is Q_θ(s_t, ·) and vbar[t] is V̄(s_t) for t = 0 … L−1; act[t] is the
// index of a_t in the action set; reward is R, received after the last
// step. It returns the sums over t of ½(δˢ_t)² and ½(δᵐ_t)², and writes to
// gq[t] the gradient of their total with respect to q[t] (the caller
// scales it by the batch normaliser). pi is scratch for one step's policy,
// and ent receives the sum over t of the policy's entropy.
func episodeLoss(q [][]float64, vbar []float64, act []int, reward float64, gq [][]float64, pi []float64) (single, multi, ent float64) {
	n := len(q)
	logPi := make([]float64, n)
	// Σ_{l≥t} log π_θ(a_l|s_l), accumulated from the end.
	tail := make([]float64, n+1)
	for t := n - 1; t >= 0; t-- {
		v := logSumExp(q[t])
		logPi[t] = q[t][act[t]] - v
		tail[t] = tail[t+1] + logPi[t]
	}
	var c float64 // C_l = Σ_{t≤l} δᵐ_t
	for t := range n {
		r, vNext := 0.0, 0.0
		if t == n-1 {
			r = reward
		} else {
			vNext = vbar[t+1]
		}
		ds := r + vNext - q[t][act[t]]
		dm := -vbar[t] + reward - tail[t]
		single += 0.5 * ds * ds
		multi += 0.5 * dm * dm
		c += dm
		softmaxInto(pi, q[t])
		ent += entropy(pi)
		g := gq[t]
		for a, p := range pi {
			g[a] = c * p
		}
		g[act[t]] -= ds + c
	}
	return single, multi, ent
}
