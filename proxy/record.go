package proxy

import (
	"encoding/binary"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// maxVariants bounds how many answers of one key a record keeps.
const maxVariants = 8

// record is what the proxy stores under one cache key: the answers seen for
// that key, which differ only in the fields subsumption can serve from
// (log-probability depth and max_tokens).
type record struct {
	Variants []variant `json:"v"`
}

// variant is one stored answer: a complete single-prompt response body as a
// client would have received it, plus what it covers.
type variant struct {
	Logprobs  int             `json:"lp"`
	MaxTokens int             `json:"mt"`
	Finish    string          `json:"fr,omitempty"`
	Tokens    int             `json:"tk"` // completion tokens with token-level data; -1 when not known
	Usage     wire.Usage      `json:"u"`
	Estimated bool            `json:"est,omitempty"` // usage apportioned from a batched call
	StoredAt  int64           `json:"at"`
	Body      json.RawMessage `json:"b"`
}

// Records are stored in a small binary form so a cache hit decodes by
// slicing, without parsing JSON: a version byte, a variant count, then per
// variant its fixed fields and its length-prefixed finish reason and body.
// Decoded bodies alias the stored bytes and must not be modified.
const recordVersion = 1

var errBadRecord = errors.New("cache record is malformed")

func decodeRecord(b []byte) (record, error) {
	if len(b) < 2 || b[0] != recordVersion {
		return record{}, fmt.Errorf("%w: unknown version", errBadRecord)
	}
	n := int(b[1])
	b = b[2:]
	rec := record{Variants: make([]variant, 0, n)}
	for range n {
		const fixed = 4*7 + 1 + 8 + 1
		if len(b) < fixed {
			return record{}, fmt.Errorf("%w: truncated", errBadRecord)
		}
		v := variant{
			Logprobs:  int(int32(binary.BigEndian.Uint32(b[0:]))),
			MaxTokens: int(int32(binary.BigEndian.Uint32(b[4:]))),
			Tokens:    int(int32(binary.BigEndian.Uint32(b[8:]))),
			Usage: wire.Usage{
				PromptTokens:     int(int32(binary.BigEndian.Uint32(b[12:]))),
				CompletionTokens: int(int32(binary.BigEndian.Uint32(b[16:]))),
				TotalTokens:      int(int32(binary.BigEndian.Uint32(b[20:]))),
			},
			Estimated: b[28] == 1,
			StoredAt:  int64(binary.BigEndian.Uint64(b[29:])),
		}
		bodyLen := int(binary.BigEndian.Uint32(b[24:]))
		finishLen := int(b[37])
		b = b[fixed:]
		if len(b) < finishLen+bodyLen {
			return record{}, fmt.Errorf("%w: truncated", errBadRecord)
		}
		v.Finish = string(b[:finishLen])
		v.Body = b[finishLen : finishLen+bodyLen : finishLen+bodyLen]
		b = b[finishLen+bodyLen:]
		rec.Variants = append(rec.Variants, v)
	}
	if len(b) != 0 {
		return record{}, fmt.Errorf("%w: trailing bytes", errBadRecord)
	}
	return rec, nil
}

func (rec record) encode() ([]byte, error) {
	if len(rec.Variants) > 255 {
		return nil, fmt.Errorf("encode cache record: %d variants", len(rec.Variants))
	}
	size := 2
	for _, v := range rec.Variants {
		size += 38 + len(v.Finish) + len(v.Body)
	}
	out := make([]byte, 0, size)
	out = append(out, recordVersion, byte(len(rec.Variants)))
	for _, v := range rec.Variants {
		if len(v.Finish) > 255 || len(v.Body) > math.MaxUint32 {
			return nil, errors.New("encode cache record: field too long")
		}
		for _, x := range []int{v.Logprobs, v.MaxTokens, v.Tokens, v.Usage.PromptTokens, v.Usage.CompletionTokens, v.Usage.TotalTokens} {
			if x < math.MinInt32 || x > math.MaxInt32 {
				return nil, errors.New("encode cache record: number out of range")
			}
			out = binary.BigEndian.AppendUint32(out, uint32(int32(x)))
		}
		out = binary.BigEndian.AppendUint32(out, uint32(len(v.Body)))
		est := byte(0)
		if v.Estimated {
			est = 1
		}
		out = append(out, est)
		out = binary.BigEndian.AppendUint64(out, uint64(v.StoredAt))
		out = append(out, byte(len(v.Finish)))
		out = append(out, v.Finish...)
		out = append(out, v.Body...)
	}
	return out, nil
}

// with returns rec with v added, dropping the variants v can serve and the
// oldest ones beyond maxVariants.
func (rec record) with(v variant, greedy, stop bool) record {
	out := record{Variants: make([]variant, 0, len(rec.Variants)+1)}
	out.Variants = append(out.Variants, v)
	for _, old := range rec.Variants {
		if covers(v, old.Logprobs, old.MaxTokens, greedy, stop) {
			continue
		}
		out.Variants = append(out.Variants, old)
	}
	if len(out.Variants) > maxVariants {
		out.Variants = out.Variants[:maxVariants]
	}
	return out
}

// pick returns the variant that best serves a request for (logprobs,
// maxTokens), preferring an exact match.
func (rec record) pick(logprobs, maxTokens int, greedy, stop bool) (variant, bool) {
	for _, v := range rec.Variants {
		if v.Logprobs == logprobs && v.MaxTokens == maxTokens {
			return v, true
		}
	}
	for _, v := range rec.Variants {
		if covers(v, logprobs, maxTokens, greedy, stop) {
			return v, true
		}
	}
	return variant{}, false
}

// covers reports whether v can answer a request for (logprobs, maxTokens)
// exactly.
func covers(v variant, logprobs, maxTokens int, greedy, stop bool) bool {
	if !coversLogprobs(v.Logprobs, logprobs) {
		return false
	}
	if v.MaxTokens == maxTokens {
		return true
	}
	return coversMaxTokens(v, maxTokens, greedy, stop)
}

// coversLogprobs: fewer top log-probabilities than cached can be cut from the
// cached lists; none at all by dropping them. A depth of 0 must match exactly
// because providers differ in how they render it.
func coversLogprobs(have, want int) bool {
	switch {
	case want == have:
		return true
	case want == noLevel:
		return true
	case want == 0:
		return false
	default:
		return have > want
	}
}

// coversMaxTokens: a greedy answer with token-level data holds every shorter
// greedy answer as its prefix.
func coversMaxTokens(v variant, want int, greedy, stop bool) bool {
	if !greedy || want == noLevel || v.MaxTokens == noLevel || v.Tokens < 0 {
		return false
	}
	switch v.Finish {
	case "length":
		// The model was cut off at its cap: every shorter cap is a prefix.
		return want < v.Tokens
	case "stop":
		// It ended on its own. A stop sequence may have removed text the
		// tokens no longer show, so only plain end-of-text answers qualify.
		if stop {
			return false
		}
		return true
	}
	return false
}

func nowUnix(now time.Time) int64 { return now.Unix() }
