// Package reward turns the next-token log-probabilities a language model
// gives for a classification prompt into the reward a prompt search learns
// from.
//
// It follows the classification reward of Deng et al. 2022, "RLPrompt:
// Optimizing Discrete Text Prompts with Reinforcement Learning"
// (arXiv 2205.12548, section on few-shot classification). For one input x
// with true label y and a candidate prompt z:
//
//  1. Read the log-probability of each label's verbalizer as the next token
//     after the filled template, and renormalise the probabilities over the
//     verbalizers only: P(c) = exp(lp(c)) / Σ_c' exp(lp(c')).
//  2. Gap = P(y) − max_{c≠y} P(c); Correct means y is the argmax.
//  3. R = λ2·Gap when correct, λ1·Gap when wrong, with λ1 = 180 and
//     λ2 = 200: a correct answer's margin is worth more, and a wrong
//     answer's (negative) gap is punished slightly less.
//  4. Stabilise: z-score each input's rewards across the prompts sampled in
//     the same step (population standard deviation plus 1e-4), so easy and
//     hard inputs weigh alike.
//  5. Scale as configured (a factor, then an optional clip).
//
// What comes from where: the piecewise form λ1^(1−Correct)·λ2^Correct·Gap,
// the constants λ1 = 180 and λ2 = 200, and the input-specific z-score are the
// paper's, as recalled from memory (the paper's text was not available while
// this was written), with λ1 for wrong and λ2 for correct. Renormalising over the
// verbalizers, the 1e-4 added to the standard deviation, the floor for
// verbalizers missing from a top-k answer, the factor and the clip are this
// package's own choices.
//
// Everything here is pure computation: no I/O, no shared state; every value
// is safe to use from several goroutines once built.
package reward
