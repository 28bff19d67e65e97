package wire_test

import (
	"encoding/json"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/wire"
)

// TestTopLogprobsKeepOrder checks a top_logprobs object is written and read
// in its order, most likely first, not sorted by token as a map would be.
func TestTopLogprobsKeepOrder(t *testing.T) {
	tests := []struct {
		name string
		in   wire.TopLogprobs
		want string
	}{
		{"two", wire.TopLogprobs{Tokens: []string{"z", "a"}, Logprobs: []float64{-0.25, -1.5}}, `{"z":-0.25,"a":-1.5}`},
		{"escaped", wire.TopLogprobs{Tokens: []string{"\"\n"}, Logprobs: []float64{-3}}, `{"\"\n":-3}`},
		{"empty", wire.TopLogprobs{}, `{}`},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			b, err := json.Marshal(&tt.in)
			require.NoError(t, err)
			assert.Equal(t, tt.want, string(b))
			var back wire.TopLogprobs
			require.NoError(t, json.Unmarshal(b, &back))
			assert.Equal(t, tt.in.Tokens, back.Tokens)
			assert.Equal(t, len(tt.in.Tokens), back.Len())
			assert.Equal(t, tt.in.Map(), back.Map())
		})
	}
	var lp wire.CompletionLogprobs
	require.NoError(t, json.Unmarshal([]byte(`{"tokens":["a","b"],"token_logprobs":[null,-1],"top_logprobs":[null,{"b":-1,"a":-2}],"text_offset":[0,1]}`), &lp))
	require.Len(t, lp.TopLogprobs, 2)
	assert.Nil(t, lp.TopLogprobs[0], "null entry for the first echoed token")
	assert.Equal(t, []string{"b", "a"}, lp.TopLogprobs[1].Tokens)
	assert.Error(t, json.Unmarshal([]byte(`[1]`), &wire.TopLogprobs{}))
	assert.Error(t, json.Unmarshal([]byte(`{"a":"x"}`), &wire.TopLogprobs{}))
}

// TestErrorCode checks an error code is written as a string or null and
// read from a string, a number or null.
func TestErrorCode(t *testing.T) {
	b, err := json.Marshal(wire.NewError("invalid_request_error", "", "", "m"))
	require.NoError(t, err)
	assert.JSONEq(t, `{"error":{"message":"m","type":"invalid_request_error","param":null,"code":null}}`, string(b))
	b, err = json.Marshal(wire.NewError("invalid_request_error", "invalid_value", "n", "m"))
	require.NoError(t, err)
	assert.JSONEq(t, `{"error":{"message":"m","type":"invalid_request_error","param":"n","code":"invalid_value"}}`, string(b))

	tests := []struct {
		in   string
		want wire.ErrorCode
	}{
		{`"rate_limited"`, "rate_limited"},
		{`429`, "429"},
		{`null`, ""},
	}
	for _, tt := range tests {
		var body wire.ErrorBody
		require.NoError(t, json.Unmarshal([]byte(`{"error":{"message":"m","code":`+tt.in+`}}`), &body), tt.in)
		assert.Equal(t, tt.want, body.Error.Code, tt.in)
	}
	var body wire.ErrorBody
	assert.Error(t, json.Unmarshal([]byte(`{"error":{"code":[1]}}`), &body))
}

// TestRequestLeavesOutUnset checks an encoded request carries only the
// fields that are set, zero values that are set included.
func TestRequestLeavesOutUnset(t *testing.T) {
	zero, one := 0.0, 1
	b, err := json.Marshal(wire.CompletionRequest{Model: "m", Prompt: json.RawMessage(`["a"]`), MaxTokens: &one, Temperature: &zero})
	require.NoError(t, err)
	assert.JSONEq(t, `{"model":"m","prompt":["a"],"max_tokens":1,"temperature":0}`, string(b))
	b, err = json.Marshal(wire.ChatRequest{Model: "m", Messages: []wire.ChatMessage{wire.TextMessage("user", "hi")}, Logprobs: true})
	require.NoError(t, err)
	assert.JSONEq(t, `{"model":"m","messages":[{"role":"user","content":"hi"}],"logprobs":true}`, string(b))
}

// TestParseStop checks the forms a stop field takes.
func TestParseStop(t *testing.T) {
	tests := []struct {
		raw    string
		want   []string
		wantOK bool
	}{
		{``, nil, true},
		{`null`, nil, true},
		{`"\n"`, []string{"\n"}, true},
		{`""`, []string{""}, true},
		{`["a","b"]`, []string{"a", "b"}, true},
		{`3`, nil, false},
		{`["a",1]`, nil, false},
	}
	for _, tt := range tests {
		got, ok := wire.ParseStop(json.RawMessage(tt.raw))
		assert.Equal(t, tt.wantOK, ok, "%s", tt.raw)
		if tt.wantOK {
			assert.Equal(t, tt.want, got, "%s", tt.raw)
		}
	}
}

// TestMessageText checks a message's content read as text, and the
// ContentError of content that is not.
func TestMessageText(t *testing.T) {
	tests := []struct {
		content string
		want    string
		part    int // of the ContentError; 0 for none
		typ     string
	}{
		{`"hi"`, "hi", 0, ""},
		{`null`, "", 0, ""},
		{`[{"type":"text","text":"a "},{"type":"text","text":"b"}]`, "a b", 0, ""},
		{`[{"type":"text","text":"a"},{"type":"image_url"}]`, "", 1, "image_url"},
		{`7`, "", -1, ""},
	}
	for _, tt := range tests {
		got, err := wire.ChatMessage{Role: "user", Content: json.RawMessage(tt.content)}.Text()
		if tt.part == 0 {
			require.NoError(t, err, tt.content)
			assert.Equal(t, tt.want, got, tt.content)
			continue
		}
		var ce *wire.ContentError
		require.ErrorAs(t, err, &ce, tt.content)
		assert.Equal(t, tt.part, ce.Part, tt.content)
		assert.Equal(t, tt.typ, ce.Type, tt.content)
	}
	got, err := wire.TextMessage("user", "<x>").Text()
	require.NoError(t, err)
	assert.Equal(t, "<x>", got, "TextMessage round trip")
}
