package proxy_test

import (
	"bytes"
	"encoding/json"
	"fmt"
	"net/http"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

const model = upstreamtest.ModelSmall

func greedy(prompt any, extra ...any) map[string]any {
	body := map[string]any{"model": model, "prompt": prompt, "temperature": 0, "max_tokens": 8}
	for i := 0; i+1 < len(extra); i += 2 {
		body[extra[i].(string)] = extra[i+1]
	}
	return body
}

func TestRepeatedGreedyCallIsAnsweredFromCache(t *testing.T) {
	r := newRig(t)
	first := r.complete(greedy("The barge left the lock at dawn"))
	require.Equal(t, http.StatusOK, first.status, "first call: status %d cache %q, want 200 miss: %s", first.status, first.cache(), first.body)
	require.Equal(t, proxy.OutcomeMiss, first.cache(), "first call: status %d cache %q, want 200 miss: %s", first.status, first.cache(), first.body)
	second := r.complete(greedy("The barge left the lock at dawn"))
	require.Equal(t, http.StatusOK, second.status, "second call: status %d cache %q, want 200 hit", second.status, second.cache())
	require.Equal(t, proxy.OutcomeHit, second.cache(), "second call: status %d cache %q, want 200 hit", second.status, second.cache())
	assert.True(t, bytes.Equal(first.body, second.body), "hit body differs from the miss body:\n%s\n%s", first.body, second.body)
	got := r.upstreamGenerations()
	assert.Equal(t, 1, got, "upstream calls = %d, want 1", got)
}

func TestWhatIsCached(t *testing.T) {
	tests := []struct {
		name      string
		body      map[string]any
		wantCalls int // upstream calls after sending body twice
		wantCache string
	}{
		{"greedy", greedy("hives on the water"), 1, proxy.OutcomeHit},
		{"sampled", greedy("hives on the water", "temperature", 0.8), 2, proxy.OutcomeBypass},
		{"temperature absent defaults to 1", map[string]any{"model": model, "prompt": "hives", "max_tokens": 4}, 2, proxy.OutcomeBypass},
		{"n above 1", greedy("hives", "n", 2), 2, proxy.OutcomeBypass},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r := newRig(t)
			r.complete(tt.body)
			got := r.complete(tt.body)
			require.Equal(t, http.StatusOK, got.status, "status %d: %s", got.status, got.body)
			assert.Equal(t, tt.wantCache, got.cache(), "Stint-Cache = %q, want %q", got.cache(), tt.wantCache)
			calls := r.upstreamGenerations()
			assert.Equal(t, tt.wantCalls, calls, "upstream calls = %d, want %d", calls, tt.wantCalls)
		})
	}
}

func TestCacheSampledSwitch(t *testing.T) {
	r := newRig(t, func(o *proxy.Options) { o.CacheSampled = true })
	body := greedy("hives", "temperature", 0.9, "n", 3)
	a := r.complete(body)
	b := r.complete(body)
	require.Equal(t, proxy.OutcomeHit, b.cache(), "sampled call with cache.sampled on: cache %q, bodies equal %v", b.cache(), bytes.Equal(a.body, b.body))
	require.True(t, bytes.Equal(a.body, b.body), "sampled call with cache.sampled on: cache %q, bodies equal %v", b.cache(), bytes.Equal(a.body, b.body))
}

func TestKeyIgnoresTransportFieldsAndFormatting(t *testing.T) {
	r := newRig(t)
	base := `{"model":"quill-small","prompt":"honey by the crate","temperature":0,"max_tokens":6}`
	got := r.complete(base)
	require.Equal(t, proxy.OutcomeMiss, got.cache(), "first: %q %s", got.cache(), got.body)
	same := []string{
		// Member order and white space (RFC 8785 §3.2.3 sorting, §3.2.1 no insignificant white space).
		`{ "max_tokens": 6, "temperature": 0, "prompt": "honey by the crate", "model": "quill-small" }`,
		// Number forms that denote the same value (RFC 8785 §3.2.2.3).
		`{"model":"quill-small","prompt":"honey by the crate","temperature":0.0,"max_tokens":6}`,
		`{"model":"quill-small","prompt":"honey by the crate","temperature":0e5,"max_tokens":6.0}`,
		// Escapes that denote the same string (RFC 8785 §3.2.2.2).
		`{"model":"quill-small","prompt":"honey by the cr\u0061te","temperature":0,"max_tokens":6}`,
		// Transport fields are not part of the key.
		`{"model":"quill-small","prompt":"honey by the crate","temperature":0,"max_tokens":6,"user":"someone"}`,
		// A one-element prompt array is the same prompt.
		`{"model":"quill-small","prompt":["honey by the crate"],"temperature":0,"max_tokens":6}`,
	}
	for _, b := range same {
		got := r.complete(b)
		assert.Equal(t, proxy.OutcomeHit, got.cache(), "%s: Stint-Cache %q, want hit", b, got.cache())
	}
	different := []string{
		`{"model":"quill-small","prompt":"honey by the crate","temperature":0,"max_tokens":6,"seed":7}`,
		`{"model":"quill-small","prompt":"honey by the crate","temperature":0,"max_tokens":6,"x_unknown":{"a":1}}`,
		`{"model":"quill-small","prompt":"honey by the crate ","temperature":0,"max_tokens":6}`,
		`{"model":"quill-large","prompt":"honey by the crate","temperature":0,"max_tokens":6}`,
		`{"model":"quill-small","prompt":"honey by the crate","temperature":0,"max_tokens":6,"echo":true}`,
	}
	for _, b := range different {
		got := r.complete(b)
		assert.Equal(t, proxy.OutcomeMiss, got.cache(), "%s: Stint-Cache %q, want miss", b, got.cache())
	}
	// Unknown fields reach the upstream untouched.
	reqs := r.up.Requests()
	found := false
	for _, q := range reqs {
		if bytes.Contains(q.Body, []byte(`"x_unknown":{"a":1}`)) {
			found = true
		}
	}
	assert.True(t, found, "the unknown field x_unknown did not reach the upstream")
}

func TestNamespacesSeparateTeamsUnlessShared(t *testing.T) {
	a, b, c := teamWithKey("alpha", "key-a"), teamWithKey("beta", "key-b"), teamWithKey("gamma", "key-c")
	b.Namespace, c.Namespace = "shared", "shared"
	r := newRig(t, withTeams(a, b, c))
	body := greedy("a crate of clover honey")
	for _, step := range []struct {
		key, want string
	}{
		{"key-a", proxy.OutcomeMiss},
		{"key-a", proxy.OutcomeHit},
		{"key-b", proxy.OutcomeMiss}, // alpha's answer is not beta's
		{"key-c", proxy.OutcomeHit},  // beta and gamma share a namespace
	} {
		r.key = step.key
		got := r.complete(body)
		assert.Equal(t, step.want, got.cache(), "team key %s: Stint-Cache %q, want %q", step.key, got.cache(), step.want)
	}
}

func TestClientKeyIsNotForwarded(t *testing.T) {
	r := newRig(t, withTeams(teamWithKey("lab", "client-key-123")))
	r.key = "client-key-123"
	got := r.complete(greedy("wax"))
	require.Equal(t, http.StatusOK, got.status, "status %d: %s", got.status, got.body)
	for _, q := range r.up.Requests() {
		auth := q.Header.Get("Authorization")
		assert.Equal(t, "Bearer "+upstreamKey, auth, "upstream saw Authorization %q, want the upstream key", auth)
		assert.False(t, bytes.Contains(q.Body, []byte("client-key-123")), "client key reached the upstream in the body")
	}
}

func TestBatchSplitSendsOnlyMissingPrompts(t *testing.T) {
	r := newRig(t)
	first := r.complete(greedy([]string{"alpha hive", "beta hive"}, "logprobs", 2))
	require.Equal(t, http.StatusOK, first.status, "first batch: %d %q %s", first.status, first.cache(), first.body)
	require.Equal(t, proxy.OutcomeMiss, first.cache(), "first batch: %d %q %s", first.status, first.cache(), first.body)
	require.Equal(t, 2, r.up.Prompts(), "upstream prompts after first batch")
	second := r.complete(greedy([]string{"beta hive", "gamma hive", "alpha hive"}, "logprobs", 2))
	require.Equal(t, http.StatusOK, second.status, "second batch: %d %q %s", second.status, second.cache(), second.body)
	require.Equal(t, proxy.OutcomePartial, second.cache(), "second batch: %d %q %s", second.status, second.cache(), second.body)
	assert.Equal(t, "2/3", second.header.Get(proxy.HeaderCachedPrompt), proxy.HeaderCachedPrompt)
	assert.Equal(t, 3, r.up.Prompts(), "upstream prompts after second batch (only gamma is new)")
	reqs := r.up.Requests()
	var last struct {
		Prompt []string `json:"prompt"`
	}
	assert.NoError(t, json.Unmarshal(reqs[len(reqs)-1].Body, &last), "upstream request body")
	assert.Equal(t, []string{"gamma hive"}, last.Prompt, "upstream got prompt")
	// Every choice matches what the upstream answers for that prompt alone.
	got := decodeCompletion(t, second.body)
	sumPrompt, sumCompletion := 0, 0
	for i, p := range []string{"beta hive", "gamma hive", "alpha hive"} {
		want := decodeCompletion(t, r.direct("/v1/completions", greedy(p, "logprobs", 2)).body)
		assert.False(t, got.Choices[i].Index != i || got.Choices[i].Text != want.Choices[0].Text, "choice %d: index %d text %q, want index %d text %q", i, got.Choices[i].Index, got.Choices[i].Text, i, want.Choices[0].Text)
		assert.Equal(t, fmt.Sprint(want.Choices[0].Logprobs.Tokens), fmt.Sprint(got.Choices[i].Logprobs.Tokens), "choice %d tokens %v, want %v", i, got.Choices[i].Logprobs.Tokens, want.Choices[0].Logprobs.Tokens)
		sumPrompt += want.Usage.PromptTokens
		sumCompletion += want.Usage.CompletionTokens
	}
	assert.Equal(t, sumPrompt, got.Usage.PromptTokens, "usage %+v, want prompt %d completion %d", got.Usage, sumPrompt, sumCompletion)
	assert.Equal(t, sumCompletion, got.Usage.CompletionTokens, "usage %+v, want prompt %d completion %d", got.Usage, sumPrompt, sumCompletion)
	assert.Equal(t, sumPrompt+sumCompletion, got.Usage.TotalTokens, "usage %+v, want prompt %d completion %d", got.Usage, sumPrompt, sumCompletion)
	before := r.up.Prompts()
	third := r.complete(greedy([]string{"gamma hive", "alpha hive"}, "logprobs", 2))
	assert.Equal(t, proxy.OutcomeHit, third.cache(), "third batch: cache %q, upstream prompts %d; want hit, %d", third.cache(), r.up.Prompts(), before)
	assert.Equal(t, before, r.up.Prompts(), "third batch: cache %q, upstream prompts %d; want hit, %d", third.cache(), r.up.Prompts(), before)
}

func TestBatchMergeWithSeveralChoicesPerPrompt(t *testing.T) {
	r := newRig(t, func(o *proxy.Options) { o.CacheSampled = true })
	body := func(prompts ...string) map[string]any {
		return map[string]any{"model": model, "prompt": prompts, "temperature": 0.7, "seed": 3, "n": 2, "max_tokens": 5, "logprobs": 1}
	}
	a := decodeCompletion(t, r.complete(body("p one", "p two")).body)
	mixed := r.complete(body("p three", "p two", "p one"))
	require.Equal(t, proxy.OutcomePartial, mixed.cache(), "cache %q, want partial", mixed.cache())
	m := decodeCompletion(t, mixed.body)
	require.Len(t, m.Choices, 6, "%d choices, want 6", len(m.Choices))
	for i, ch := range m.Choices {
		assert.Equal(t, i, ch.Index, "choice %d has index %d", i, ch.Index)
	}
	// "p two" was prompt 1 of the first call (choices 2,3), now prompt 1 again;
	// "p one" was prompt 0 (choices 0,1), now prompt 2 (choices 4,5).
	for j := range 2 {
		assert.False(t, m.Choices[2+j].Text != a.Choices[2+j].Text || m.Choices[4+j].Text != a.Choices[j].Text, "sample %d: merged texts do not match the cached answers", j)
	}
}

func TestFewerLogprobsServedFromLargerAnswer(t *testing.T) {
	r := newRig(t)
	big := decodeCompletion(t, r.complete(greedy("smoke calms the bees", "logprobs", 5)).body)
	small := r.complete(greedy("smoke calms the bees", "logprobs", 2))
	require.Equal(t, proxy.OutcomeHit, small.cache(), "logprobs 2 after 5: cache %q, want hit", small.cache())
	want := decodeCompletion(t, r.direct("/v1/completions", greedy("smoke calms the bees", "logprobs", 2)).body)
	got := decodeCompletion(t, small.body)
	require.Equal(t, want.Choices[0].Text, got.Choices[0].Text, "text %q, want %q", got.Choices[0].Text, want.Choices[0].Text)
	for i, top := range got.Choices[0].Logprobs.TopLogprobs {
		require.Len(t, top, 2, "position %d has %d top logprobs, want 2", i, len(top))
		for tok, lp := range want.Choices[0].Logprobs.TopLogprobs[i] {
			assert.Equal(t, lp, top[tok], "position %d token %q: %v, want %v", i, tok, top[tok], lp)
		}
		for tok := range top {
			_, ok := big.Choices[0].Logprobs.TopLogprobs[i][tok]
			assert.True(t, ok, "token %q was not in the stored answer", tok)
		}
	}
	// Order: most likely first, as stored.
	raw := string(small.body)
	require.Contains(t, raw, `"top_logprobs":[{`, "no top_logprobs in %s", raw)
	none := r.complete(greedy("smoke calms the bees"))
	assert.Equal(t, proxy.OutcomeHit, none.cache(), "no logprobs after 5: cache %q, want hit", none.cache())
	lp := decodeCompletion(t, none.body).Choices[0].Logprobs
	assert.Nil(t, lp, "logprobs %+v, want null", lp)
	more := r.complete(greedy("smoke calms the bees", "logprobs", 8))
	assert.Equal(t, proxy.OutcomeMiss, more.cache(), "logprobs 8 after 5: cache %q, want miss", more.cache())
	// 1 direct call + 2 through the proxy
	assert.Equal(t, 1+2, r.upstreamGenerations(), "upstream calls = %d, want 3", r.upstreamGenerations())
}

func TestChatFewerTopLogprobs(t *testing.T) {
	r := newRig(t)
	body := func(top int) map[string]any {
		b := map[string]any{"model": model, "temperature": 0, "max_tokens": 6,
			"messages": []map[string]string{{"role": "user", "content": "Where do the barges winter?"}}}
		if top >= 0 {
			b["logprobs"] = true
			b["top_logprobs"] = top
		}
		return b
	}
	r.chat(body(4))
	got := r.chat(body(1))
	require.Equal(t, proxy.OutcomeHit, got.cache(), "top_logprobs 1 after 4: cache %q", got.cache())
	want := decodeChat(t, r.direct("/v1/chat/completions", body(1)).body)
	g := decodeChat(t, got.body)
	require.Equal(t, want.Choices[0].Message.Content, g.Choices[0].Message.Content, "content %q, want %q", g.Choices[0].Message.Content, want.Choices[0].Message.Content)
	for i, c := range g.Choices[0].Logprobs.Content {
		w := want.Choices[0].Logprobs.Content[i]
		if assert.Len(t, c.TopLogprobs, 1, "token %d: top %+v, want %+v", i, c.TopLogprobs, w.TopLogprobs) {
			assert.Equal(t, w.TopLogprobs[0].Token, c.TopLogprobs[0].Token, "token %d: top %+v, want %+v", i, c.TopLogprobs, w.TopLogprobs)
		}
	}
	plain := r.chat(body(-1))
	if assert.Equal(t, proxy.OutcomeHit, plain.cache(), "no logprobs after 4: cache") {
		assert.Nil(t, decodeChat(t, plain.body).Choices[0].Logprobs, "no logprobs after 4: body %s", plain.body)
	}
}

// promptEnding finds a prompt whose greedy 24-token answer from the fake has
// the given finish reason (the fake is deterministic, so this is stable).
func promptEnding(t *testing.T, r *rig, finish string, from int) string {
	t.Helper()
	for i := from; i < from+200; i++ {
		p := fmt.Sprintf("the queen is calm on barge %d", i)
		if decodeCompletion(t, r.direct("/v1/completions", greedy(p, "logprobs", 1, "max_tokens", 24)).body).Choices[0].FinishReason == finish {
			return p
		}
	}
	require.Failf(t, "no prompt found", "no prompt found whose answer ends with %q", finish)
	return ""
}

func TestShorterGreedyAnswerCutFromLongerOne(t *testing.T) {
	r := newRig(t)
	capped := promptEnding(t, r, "length", 0)
	ended := promptEnding(t, r, "stop", 0)
	plain := promptEnding(t, r, "length", 1000)
	r.complete(greedy(capped, "logprobs", 1, "max_tokens", 24))
	r.complete(greedy(ended, "logprobs", 1, "max_tokens", 24))
	check := func(prompt string, n int, wantCache string) {
		t.Helper()
		short := greedy(prompt, "logprobs", 1, "max_tokens", n)
		got := r.complete(short)
		if !assert.Equal(t, wantCache, got.cache(), "%q max_tokens %d after 24: cache", prompt, n) {
			return
		}
		want := decodeCompletion(t, r.direct("/v1/completions", short).body)
		g := decodeCompletion(t, got.body)
		assert.False(t, g.Choices[0].Text != want.Choices[0].Text || g.Choices[0].FinishReason != want.Choices[0].FinishReason, "max_tokens %d: got %q (%s), want %q (%s)", n, g.Choices[0].Text, g.Choices[0].FinishReason, want.Choices[0].Text, want.Choices[0].FinishReason)
		assert.True(t, g.Usage == want.Usage, "max_tokens %d: usage %+v, want %+v", n, g.Usage, want.Usage)
		assert.Equal(t, fmt.Sprint(want.Choices[0].Logprobs.Tokens), fmt.Sprint(g.Choices[0].Logprobs.Tokens), "max_tokens %d: tokens differ", n)
	}
	for _, n := range []int{1, 5, 12} {
		check(capped, n, proxy.OutcomeHit)
	}
	// Cut off at its cap: a longer cap needs the model again.
	check(capped, 30, proxy.OutcomeMiss)
	// Ended on its own before the cap: a longer cap gives the same answer.
	check(ended, 40, proxy.OutcomeHit)
	check(ended, 1, proxy.OutcomeHit)

	// Without token data there is nothing to cut exactly.
	r.complete(greedy(plain, "max_tokens", 24))
	got := r.complete(greedy(plain, "max_tokens", 5))
	assert.Equal(t, proxy.OutcomeMiss, got.cache(), "cut without token data: cache %q, want miss", got.cache())
}

func TestCacheControlDirectives(t *testing.T) {
	r := newRig(t)
	body := greedy("pollen count")
	// RFC 9111 §5.2.1.7 only-if-cached: 504 when not stored.
	got := r.complete(body, "Cache-Control", "only-if-cached")
	assert.Equal(t, http.StatusGatewayTimeout, got.status, "only-if-cached on a miss: status %d, want 504", got.status)
	require.Equal(t, 0, r.upstreamGenerations(), "only-if-cached reached the upstream")
	// RFC 9111 §5.2.1.5 no-store: answer, do not store.
	got = r.complete(body, "Cache-Control", "no-store")
	assert.Equal(t, proxy.OutcomeMiss, got.cache(), "no-store: cache %q", got.cache())
	got = r.complete(body)
	assert.Equal(t, proxy.OutcomeMiss, got.cache(), "after no-store: cache %q, want miss (nothing stored)", got.cache())
	got = r.complete(body, "Cache-Control", "only-if-cached")
	assert.Equal(t, proxy.OutcomeHit, got.cache(), "only-if-cached on a hit: status %d cache %q", got.status, got.cache())
	// RFC 9111 §5.2.1.4 no-cache: go upstream even though stored.
	before := r.upstreamGenerations()
	got = r.complete(body, "Cache-Control", "no-cache")
	assert.Equal(t, proxy.OutcomeMiss, got.cache(), "no-cache: cache %q, want miss", got.cache())
	assert.Equal(t, before+1, r.upstreamGenerations(), "no-cache did not reach the upstream")
}

func TestModelsIsPassedThroughAndCachedBriefly(t *testing.T) {
	r := newRig(t)
	for range 3 {
		resp, err := http.Get(r.srv.URL + "/v1/models")
		require.NoError(t, err)
		var list struct {
			Data []struct {
				ID string `json:"id"`
			} `json:"data"`
		}
		err = json.NewDecoder(resp.Body).Decode(&list)
		resp.Body.Close()
		require.NoError(t, err, "models: %v %+v", err, list)
		require.Len(t, list.Data, 2, "models: %v %+v", err, list)
	}
	got := r.up.Calls().Models
	assert.Equal(t, 1, got, "upstream /models calls = %d, want 1", got)
}
