// Package cache holds what the proxy needs to remember answers: canonical
// request keys, the Store interface its backends implement, the in-process
// hot tier in front of a store, and in-flight coalescing.
//
// The package knows nothing of HTTP or of the completions wire format: values
// are opaque bytes that the proxy encodes and decodes.
//
// The pieces:
//
//   - Key derives an entry's key from KeyParts and the request body's
//     canonical JSON, which package cache/canon produces (RFC 8785).
//   - Store is the backend contract; cache/boltstore is the embedded,
//     crash-safe file backend, and cache/storetest the conformance suite every
//     backend runs.
//   - Hot is an in-memory tier that itself implements Store, in front of any
//     backend: NewHot(boltstore, HotOptions{}) is the single-machine setup.
package cache
