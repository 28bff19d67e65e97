package cache

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
)

// KeyParts are the parts of a cache key besides the request body. Each is
// hashed as given: callers normalize them (for example, the upstream's base
// URL without a trailing slash) before building a key.
type KeyParts struct {
	// Namespace separates entries that must not be shared: the team by
	// default, or a namespace several teams were configured to share.
	Namespace string
	// Upstream identifies the paid API that answered, such as its base URL.
	Upstream string
	// Endpoint is the request path, such as "/v1/chat/completions".
	Endpoint string
	// Model is the model the request names.
	Model string
}

// keyDomain starts every key's hash input, so keys of this scheme can never
// collide with digests of anything else, and a later scheme can change it.
const keyDomain = "stint cache key v1\x00"

// Key returns the cache key of a request: the lowercase hex SHA-256 digest
// (64 characters) of a domain tag followed by Namespace, Upstream, Endpoint,
// Model and canonicalBody, each preceded by its length as 8 big-endian bytes.
// The length prefixes keep fields from running into each other: ("ab", "c")
// and ("a", "bc") hash differently.
//
// canonicalBody is the RFC 8785 canonical JSON (see package canon) of the
// request fields that affect the answer; the proxy writes it with
// canon.Canonicalizer.ExactIntegers, so that integers a double cannot hold
// keep their digits and do not share a key.
func Key(parts KeyParts, canonicalBody []byte) string {
	var sum [sha256.Size]byte
	n := len(keyDomain) + 5*8 + len(parts.Namespace) + len(parts.Upstream) + len(parts.Endpoint) + len(parts.Model) + len(canonicalBody)
	if n <= smallKeyInput {
		// Typical requests: one contiguous input on the stack, no allocation
		// but the result.
		var stack [smallKeyInput]byte
		in := append(stack[:0], keyDomain...)
		in = appendField(in, parts.Namespace)
		in = appendField(in, parts.Upstream)
		in = appendField(in, parts.Endpoint)
		in = appendField(in, parts.Model)
		in = binary.BigEndian.AppendUint64(in, uint64(len(canonicalBody)))
		in = append(in, canonicalBody...)
		sum = sha256.Sum256(in)
	} else {
		h := sha256.New()
		h.Write([]byte(keyDomain))
		for _, f := range [...]string{parts.Namespace, parts.Upstream, parts.Endpoint, parts.Model} {
			h.Write(binary.BigEndian.AppendUint64(nil, uint64(len(f))))
			h.Write([]byte(f))
		}
		h.Write(binary.BigEndian.AppendUint64(nil, uint64(len(canonicalBody))))
		h.Write(canonicalBody)
		h.Sum(sum[:0])
	}
	var out [2 * sha256.Size]byte
	hex.Encode(out[:], sum[:])
	return string(out[:])
}

// smallKeyInput is the largest key input hashed from a stack buffer.
const smallKeyInput = 2048

func appendField(dst []byte, s string) []byte {
	dst = binary.BigEndian.AppendUint64(dst, uint64(len(s)))
	return append(dst, s...)
}
