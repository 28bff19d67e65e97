// Package scorer asks a completions-wire-format API — normally through the
// stint proxy — for the next-token log-probabilities of filled prompt
// templates, the raw material of a prompt search's reward.
//
// A Client sends, for the completions endpoint, one POST {base}/completions
// per batch with "prompt" as an array of texts, "max_tokens" 1,
// "temperature" 0 and "logprobs" k, and reads choices[i].logprobs
// .top_logprobs[0] for text i; for the chat endpoint, one POST
// {base}/chat/completions per text, the text as a single user message, with
// "logprobs": true and "top_logprobs" k, reading
// choices[0].logprobs.content[0].top_logprobs. Greedy single-token calls are
// what the proxy caches, so repeated (prompt, example) pairs cost nothing.
//
// Each call reports its usage and the proxy's Cache-Status,
// Stint-Cached-Prompts and Stint-Cost-Usd headers, so the caller can show
// the cache share and the spend. Non-200 answers become *APIError values;
// 402 (budget exhausted), 429 (rate limited) and 503 (unavailable) unwrap to
// ErrBudget, ErrRateLimited and ErrUnavailable so the caller can stop or
// wait.
package scorer
