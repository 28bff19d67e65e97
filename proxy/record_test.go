package proxy

import (
	"encoding/json"
	"reflect"
	"testing"

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
		if err != nil {
			t.Fatalf("record %d: encode: %v", i, err)
		}
		got, err := decodeRecord(b)
		if err != nil {
			t.Fatalf("record %d: decode: %v", i, err)
		}
		if len(rec.Variants) == 0 && len(got.Variants) == 0 {
			continue
		}
		if !reflect.DeepEqual(got, rec) {
			t.Errorf("record %d: got %+v, want %+v", i, got, rec)
		}
		// Every truncation is refused, never a panic.
		for n := range len(b) {
			if _, err := decodeRecord(b[:n]); err == nil {
				t.Errorf("record %d truncated to %d bytes decoded without error", i, n)
			}
		}
	}
}

func TestRecordWithDropsCoveredVariants(t *testing.T) {
	small := variant{Logprobs: 2, MaxTokens: 8, Tokens: 8, Finish: "length"}
	big := variant{Logprobs: 5, MaxTokens: 24, Tokens: 24, Finish: "length"}
	other := variant{Logprobs: noLevel, MaxTokens: noLevel, Tokens: noLevel}
	rec := record{}.with(small, true, false).with(other, true, false).with(big, true, false)
	if len(rec.Variants) != 2 || rec.Variants[0].Logprobs != 5 {
		t.Fatalf("got %+v, want big and the variant it cannot cover", rec.Variants)
	}
	if v, ok := rec.pick(2, 8, true, false); !ok || v.Logprobs != 5 {
		t.Errorf("pick(2, 8) = %+v, %v; want the big variant", v, ok)
	}
	if _, ok := rec.pick(8, 8, true, false); ok {
		t.Error("pick(8, 8) found a variant; none has 8 log-probabilities")
	}
}
