// Package policy is the prompt-search policy and its soft Q-learning trainer:
// a small trainable MLP on top of a frozen language model proposes discrete
// prompt tokens one at a time, and learns from one scalar reward per finished
// prompt (the RL-prompt method of Deng et al. 2022, arXiv 2205.12548, trained
// with the soft Q-learning losses of Guo et al. 2021, arXiv 2106.07704).
//
// # Policy
//
// A state s is the prompt generated so far (after the backbone's start
// context). The frozen backbone gives its last hidden state h(s) (D values)
// and its output head W (vocabulary × D). The trainable part is
//
//	f(h) = W₂ · gelu(W₁·h + b₁) + b₂        (D → Hidden → D, exact erf GELU)
//	Q(s, a) = W_a · f(h(s))                  for a in the action set A
//
// where W_a is row a of the head. No bias is added after the head: f's own
// output bias b₂ already shifts Q through W, and a per-action bias would let
// the policy ignore the state. The action set A is every vocabulary token, or
// the allow-list Config.Actions; Q, V and the policy only ever range over A.
// W₁ starts from N(0, 1/D), W₂ from N(0, 10⁻⁶/Hidden) and both biases at
// zero, so the initial Q values are within about 10⁻² of zero: the policy
// starts near uniform over A, yet Q is not exactly flat, so top-k
// exploration's first choices depend on the state and seed rather than on
// the order of A (with W₂ = 0, every top-k tie would go to A's first k
// tokens).
//
//	V(s) = log Σ_{a∈A} exp Q(s, a)           (soft value)
//	π(a|s) = exp(Q(s, a) − V(s))             (softmax policy)
//	A(s, a) = Q(s, a) − V(s) = log π(a|s)    (soft advantage)
//
// # Episodes
//
// An episode is a prompt a₀ … a_{L−1} of exactly L = Config.PromptLength
// tokens: s₀ is the empty prompt, s_{t+1} = s_t followed by a_t, and s_L is
// terminal with V(s_L) = 0. The caller's reward R for the whole prompt is the
// last step's reward: r_{L−1} = R and r_t = 0 before it. There is no
// discount (γ = 1). Reward scaling is the caller's job: the policy's sharpness
// is exp(reward differences), so rewards of a few units give a peaked policy.
//
// # Losses
//
// Q_θ is the trained network and Q̄ a target copy (θ̄) that follows it by
// Polyak averaging; V̄ and Ā are computed from Q̄ and never differentiated.
// For each prompt in a batch and each step t = 0 … L−1 the trainer forms two
// residuals:
//
//	single-step:  δˢ_t = −V_θ(s_t) + r_t + V̄(s_{t+1}) − A_θ(s_t, a_t)
//	                   = r_t + V̄(s_{t+1}) − Q_θ(s_t, a_t)
//	multi-step:   δᵐ_t = −V̄(s_t) + Σ_{l=t}^{L−1} r_l − Σ_{l=t}^{L−1} A_θ(s_l, a_l)
//	                   = −V̄(s_t) + R − Σ_{l=t}^{L−1} log π_θ(a_l|s_l)
//
// and the loss minimised by one Update is the mean of ½δ² over both kinds
// and all N = batch·L (prompt, step) pairs:
//
//	Loss = (1/2N) Σ_{prompts} Σ_t [ ½(δˢ_t)² + ½(δᵐ_t)² ]
//
// Why these are right. The soft Bellman equation (Haarnoja et al. 2017;
// Guo et al. 2021) for this deterministic tree is Q*(s_t, a) = r_t +
// V*(s_{t+1}) with V* = log Σ exp Q*. Substituting log π* = Q* − V* gives the
// one-step path consistency V*(s_t) = r_t + V*(s_{t+1}) − log π*(a_t|s_t), and
// summing it along the rest of the episode (V*(s_L) = 0) the multi-step one,
// V*(s_t) = R − Σ_{l≥t} log π*(a_l|s_l). So at θ = θ̄ = θ* both residuals are
// zero for every state and action: the soft optimum is a fixed point of
// Update, with no sampling noise left. Conversely, δˢ = 0 everywhere with
// θ = θ̄ is the Bellman equation itself, which pins the absolute level of Q.
// The two terms do different jobs: the gradient of the single-step term is
// ordinary soft Q regression of Q_θ(s_t, a_t) toward the bootstrapped target
// r_t + V̄(s_{t+1}), and that of the multi-step term is −δᵐ_t Σ_{l≥t} ∇log
// π_θ(a_l|s_l), an entropy-regularised policy gradient with V̄(s_t) as its
// baseline, which carries the terminal reward to the first token at once
// instead of waiting for the target network to bootstrap it back. (The
// advantage's gradient is orthogonal to shifting all of Q(s,·) by a constant,
// so the multi-step term shapes the policy and the single-step term fixes
// the values.)
//
// The gradient with respect to Q_θ(s_l, ·) used by the hand-written backward
// pass is, with eₐ the unit vector of action a and C_l = Σ_{t≤l} δᵐ_t,
//
//	∂Loss/∂Q_θ(s_l, ·) = −(1/2N) [ δˢ_l · e_{a_l} + C_l · (e_{a_l} − π_θ(·|s_l)) ]
//
// which is then pulled back through the head (Wᵀ) and the MLP.
//
// # Optimisation
//
// Adam (β₁ 0.9, β₂ 0.999, ε 1e-8, bias-corrected) on the MLP parameters,
// after scaling the whole gradient down to Config.ClipNorm when its global
// L2 norm is larger; then θ̄ ← (1−τ)θ̄ + τθ with τ = Config.Polyak.
//
// # Sampling
//
// Sample draws on-policy prompts token by token from the softmax of the
// Config.TopK largest Q values (ties broken by action order), with a seeded
// PCG generator whose state is part of the checkpoint. Greedy takes the
// argmax of Q at each step and uses no randomness.
//
// # Backbones and checkpoints
//
// Backbone is the frozen model as an interface; Local adapts a
// *localmodel.Model and caches hidden states per prefix. Save and Load write
// and read the whole trainer state (parameters, target, Adam moments, RNG,
// step, config) in a versioned, checksummed format; a restored trainer
// continues bit-for-bit like one that was never stopped. WriteFileAtomic
// puts a checkpoint on disk with write-to-temp, fsync and rename.
//
// A Trainer is not safe for concurrent use; Local is.
package policy
