// Package searcher is the root of the prompt-search sidecar: RL prompt
// search with soft Q-learning that scores prompts only through
// completion/log-probability calls sent over HTTP, like any user's job.
//
//   - searcher/task: task files (YAML) and their datasets
//   - searcher/reward: the classification reward (gap, piecewise weights,
//     per-input z-score)
//   - searcher/scorer: the HTTP scoring client (completions prompt arrays,
//     or chat with top_logprobs)
//   - searcher/policy: the policy network on a frozen local backbone and
//     its soft Q-learning trainer, with checkpoints
//   - searcher/search: one search (loop, baselines, checkpoints, outputs)
//   - searcher/jobs: the sidecar's job manager and HTTP API
package searcher
