package proxy

import (
	"encoding/json"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/wire"
)

func TestRecordRoundTrip(t *testing.T) {
	recs := []record{
		{},
		{Variants: []variant{{Logprobs: noLevel, MaxTokens: noLevel, Tokens: noLevel, Body: json.RawMessage(`{}`)}}},
		{Variants: []variant{
			{Logprobs: 5, MaxTokens: 24, Finish: "length", Tokens: 24, Usage: wire.NewUsage(3, 24), Estimated: true, StoredAt: 1780000000, Body: json.RawMessage(`{"choices":[]}`)},
			{Logprobs: 0, MaxTokens: 0, Finish: "stop", Tokens: 0, Usage: wire.NewUsage(1, 0), StoredAt: -1, Body: json.RawMessage(`{"a":"ü"}`)},
		}},
	}
	for i, rec := range recs {
		b, err := rec.encode()
		require.NoError(t, err, "record %d: encode", i)
		got, err := decodeRecord(b)
		require.NoError(t, err, "record %d: decode", i)
		if len(rec.Variants) == 0 && len(got.Variants) == 0 {
			continue
		}
		assert.Equal(t, rec, got, "record %d", i)
		// Every truncation is refused, never a panic.
		for n := range len(b) {
			_, err := decodeRecord(b[:n])
			assert.Error(t, err, "record %d truncated to %d bytes decoded", i, n)
		}
	}
}

func TestRecordWithDropsCoveredVariants(t *testing.T) {
	small := variant{Logprobs: 2, MaxTokens: 8, Tokens: 8, Finish: "length"}
	big := variant{Logprobs: 5, MaxTokens: 24, Tokens: 24, Finish: "length"}
	other := variant{Logprobs: noLevel, MaxTokens: noLevel, Tokens: noLevel}
	rec := record{}.with(small, true, false).with(other, true, false).with(big, true, false)
	require.Len(t, rec.Variants, 2, "big and the variant it cannot cover")
	require.Equal(t, 5, rec.Variants[0].Logprobs, "big first")
	v, ok := rec.pick(2, 8, true, false)
	assert.True(t, ok, "pick(2, 8)")
	assert.Equal(t, 5, v.Logprobs, "pick(2, 8): the big variant")
	_, ok = rec.pick(8, 8, true, false)
	assert.False(t, ok, "pick(8, 8) found a variant; none has 8 log-probabilities")
}
