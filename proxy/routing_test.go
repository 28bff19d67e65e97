package proxy_test

import (
	"fmt"
	"net/http"
	"testing"

	"github.com/stretchr/testify/assert"

	"github.com/stintlab/stint/proxy"
	"github.com/stintlab/stint/proxy/upstreamtest"
)

// TestRoutingByModel checks the documented rule (README, "Using it with a
// paid API"; cmd/stint/example.yaml, "upstreams"): a request goes to the first upstream, in config order,
// whose models match, by exact name or by a prefix ending in "*"; an
// upstream without models takes everything; a model nothing matches is
// refused with 400 model_not_routed before any upstream is called. Calls
// are counted on each upstream.
func TestRoutingByModel(t *testing.T) {
	// Every upstream serves every model named here, so a call that reaches
	// the wrong one would still be answered 200 and only the counts tell.
	served := []string{"ledger-large", "ledger-small", "ledger-large-v2", "ledger", "quill-small", "ink-1"}
	type pool struct {
		name   string
		models []string
	}
	type send struct {
		model string
		chat  bool
		want  string // the upstream that must get the call; "" is 400 model_not_routed
	}
	tests := []struct {
		name  string
		pools []pool // in config order
		sends []send
	}{
		{
			"exact before prefix, then a catch-all",
			[]pool{{"exact", []string{"ledger-large"}}, {"prefix", []string{"ledger-*"}}, {"any", nil}},
			[]send{
				{"ledger-large", false, "exact"},
				{"ledger-large", true, "exact"}, // chat routes by the same rule
				{"ledger-small", false, "prefix"},
				{"ledger-large-v2", false, "prefix"}, // an exact name matches only itself
				{"ledger", false, "any"},             // "ledger-*" needs the dash
				{"quill-small", true, "any"},
			},
		},
		{
			"prefix first takes the exact name too: order decides",
			[]pool{{"prefix", []string{"ledger-*"}}, {"exact", []string{"ledger-large"}}},
			[]send{
				{"ledger-large", false, "prefix"},
				{"ledger-small", true, "prefix"},
				{"quill-small", false, ""}, // no catch-all
				{"ledger", false, ""},
			},
		},
		{
			"one upstream with an exact name and a prefix",
			[]pool{{"mixed", []string{"quill-small", "ink-*"}}, {"ledgers", []string{"ledger-*"}}},
			[]send{
				{"ink-1", false, "mixed"},
				{"quill-small", true, "mixed"},
				{"ledger-small", false, "ledgers"},
				{"ledger", true, ""},
			},
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			noLeaks(t)
			ups := map[string]*upstreamtest.Server{}
			r := newRig(t, func(o *proxy.Options) {
				o.Upstreams = nil
				for _, p := range tt.pools {
					up := upstreamtest.New(upstreamtest.Options{Key: upstreamKey, Models: served})
					t.Cleanup(up.Close)
					ups[p.name] = up
					o.Upstreams = append(o.Upstreams, proxy.Upstream{Name: p.name, BaseURL: up.URL(), Key: upstreamKey, Models: p.models})
				}
			})
			calls := func() map[string]int {
				out := map[string]int{}
				for name, up := range ups {
					c := up.Calls()
					out[name] = c.Completions + c.Chat
				}
				return out
			}
			for i, s := range tt.sends {
				before := calls()
				var got response
				if s.chat {
					got = r.chat(map[string]any{"model": s.model, "temperature": 0, "max_tokens": 4,
						"messages": []map[string]string{{"role": "user", "content": fmt.Sprintf("route %d", i)}}})
				} else {
					got = r.complete(map[string]any{"model": s.model, "temperature": 0, "max_tokens": 4, "prompt": fmt.Sprintf("route %d", i)})
				}
				after := calls()
				if s.want == "" {
					assert.Equal(t, http.StatusBadRequest, got.status, "%s (chat %v): %d %s, want 400 model_not_routed", s.model, s.chat, got.status, got.body)
					assert.Equal(t, "model_not_routed", errorCode(t, got.body), "%s (chat %v): %d %s, want 400 model_not_routed", s.model, s.chat, got.status, got.body)
				} else {
					assert.Equal(t, http.StatusOK, got.status, "%s (chat %v): %s, want 200 from %s", s.model, s.chat, got.body, s.want)
				}
				for name := range ups {
					want := 0
					if name == s.want {
						want = 1
					}
					n := after[name] - before[name]
					assert.Equal(t, want, n, "%s (chat %v): upstream %s got %d calls, want %d", s.model, s.chat, name, n, want)
				}
			}
			n := r.upstreamGenerations()
			assert.Equal(t, 0, n, "the rig's own upstream, not configured, got %d calls", n)
		})
	}
}
