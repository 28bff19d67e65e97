package proxy

import (
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// TestSplitOneFacts: the facts found while splitting a one-prompt answer
// are what tokenFacts reads from the stored body, and an answer whose
// choices do not fit the facts' shape is still served.
func TestSplitOneFacts(t *testing.T) {
	completions := &request{endpoint: endpointCompletions, n: 1}
	chat := &request{endpoint: endpointChat, n: 1}
	echo := &request{endpoint: endpointCompletions, n: 1, echo: true}
	two := &request{endpoint: endpointCompletions, n: 2}
	cases := []struct {
		name       string
		req        *request
		body       string
		wantFinish string
		wantTokens int
	}{
		{"completions with tokens", completions, `{"choices":[{"index":0,"text":" a b","finish_reason":"length","logprobs":{"tokens":[" a"," b"],"token_logprobs":[-1,-2]}}],"usage":{"prompt_tokens":3,"completion_tokens":2,"total_tokens":5}}`, "length", 2},
		{"completions without logprobs", completions, `{"choices":[{"index":0,"text":" a","finish_reason":"stop","logprobs":null}]}`, "stop", noLevel},
		{"chat with content", chat, `{"choices":[{"index":0,"message":{"role":"assistant","content":"hi"},"finish_reason":"stop","logprobs":{"content":[{"token":"hi","logprob":-0.1}]}}]}`, "stop", 1},
		{"echo does not count tokens", echo, `{"choices":[{"index":0,"text":"x a","finish_reason":"length","logprobs":{"tokens":["x"," a"]}}]}`, "length", noLevel},
		{"null finish", completions, `{"choices":[{"index":0,"text":"","finish_reason":null}]}`, "", noLevel},
		{"odd finish type falls back", completions, `{"choices":[{"index":0,"text":"","finish_reason":7}]}`, "", noLevel},
		{"n=2 has no single choice's facts", two, `{"choices":[{"index":0,"text":"a","finish_reason":"stop"},{"index":1,"text":"b","finish_reason":"stop"}]}`, "", noLevel},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			got, err := splitOne(tc.req, []byte(tc.body))
			require.NoError(t, err, "splitOne: %v %+v", err, got)
			require.Len(t, got, 1, "splitOne: %v %+v", err, got)
			require.NotNil(t, got[0].facts, "splitOne: %v %+v", err, got)
			f := got[0].facts
			assert.Equal(t, tc.wantFinish, f.finish, "facts (%q, %d), want (%q, %d)", f.finish, f.tokens, tc.wantFinish, tc.wantTokens)
			assert.Equal(t, tc.wantTokens, f.tokens, "facts (%q, %d), want (%q, %d)", f.finish, f.tokens, tc.wantFinish, tc.wantTokens)
			fin, tok := tokenFacts(tc.req, []byte(tc.body))
			assert.Equal(t, f.finish, fin, "tokenFacts (%q, %d) differs from splitOne's (%q, %d)", fin, tok, f.finish, f.tokens)
			assert.Equal(t, f.tokens, tok, "tokenFacts (%q, %d) differs from splitOne's (%q, %d)", fin, tok, f.finish, f.tokens)
			assert.Equal(t, tc.body, string(got[0].body), "the answer was not served as it came")
		})
	}
	_, err := splitOne(completions, []byte(`{"choices":[]}`))
	assert.Error(t, err, "an answer with no choice for the prompt was accepted")
}
