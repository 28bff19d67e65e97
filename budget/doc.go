// Package budget holds what stint needs to keep spending inside a team's
// budget: money as exact integers ([Nanos]), price tables and cost estimates,
// calendar budget periods, the [Ledger] contract (reserve the worst case
// before an upstream call, settle the real cost after it, charge expired
// leases in full), the spend [Journal] and the reports built from it.
//
// Backends live in subpackages: budget/boltledger (embedded, on the cache's
// bbolt file) and budget/redisledger (Redis and Redis Cluster, atomic Lua
// scripts). Token counting is in budget/tokens, rate limits in
// budget/ratelimit, and budget/ledgertest is the conformance suite every
// Ledger backend passes.
//
// Every function that depends on the time takes it as a parameter, in the
// style of golang.org/x/time/rate's AllowN(t, n), so tests control time
// without sleeping. The package knows nothing of HTTP or of configuration
// files: the proxy and the CLI fill the plain structs declared here.
package budget
