// Package proxy is stint's HTTP front: it speaks the completions wire format
// to clients, answers repeated deterministic calls from a cache.Store,
// merges identical concurrent misses, splits batched prompts so only the
// missing ones go upstream, and streams answers as text/event-stream.
//
// The request pipeline (serveGenerate in pipeline.go, one method a stage)
// is: authenticate the team key, read the body, replay or record a run,
// decode and validate the body, derive a canonical cache key per prompt,
// look up (serving smaller requests from larger stored answers when that is
// exact), and on a miss coalesce, admit the call to the budget and rate
// limits, send it upstream, store and answer. Response headers say what
// happened (Cache-Status, RFC 9211), and Prometheus metrics count it.
//
// Upstream calls go through each upstream's circuit breaker
// (proxy/breaker), its fallbacks and concurrency cap, with bounded retries
// (proxy/retry); resilience.go describes the rules.
package proxy
