package scorer

import (
	"net/http"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
)

func TestReadCall(t *testing.T) {
	tests := []struct {
		name    string
		headers map[string]string
		prompts int
		want    Call
	}{
		{"no proxy", nil, 3, Call{Prompts: 3, CachedPrompts: -1}},
		{"hit", map[string]string{HeaderCacheStatus: `stint;hit;key="ab"`, HeaderCost: "0"}, 3, Call{Prompts: 3, Cache: "hit", CachedPrompts: 3}},
		{"miss with cost", map[string]string{HeaderCacheStatus: "stint;fwd=miss;fwd-status=200;stored", HeaderCost: "0.000125"}, 1, Call{Prompts: 1, Cache: "miss", CostUSD: 0.000125}},
		{"no-cache refresh", map[string]string{HeaderCacheStatus: "stint;fwd=request;fwd-status=200;stored"}, 1, Call{Prompts: 1, Cache: "miss"}},
		{"collapsed", map[string]string{HeaderCacheStatus: "stint;fwd=miss;fwd-status=200;collapsed"}, 1, Call{Prompts: 1, Cache: "shared"}},
		{"bypass", map[string]string{HeaderCacheStatus: "stint;fwd=bypass;fwd-status=200"}, 1, Call{Prompts: 1, Cache: "bypass"}},
		{"partial batch", map[string]string{HeaderCacheStatus: "stint;fwd=partial;fwd-status=200;stored", HeaderCachedPrompts: "2/3"}, 3, Call{Prompts: 3, Cache: "partial", CachedPrompts: 2}},
		{"hit behind another cache", map[string]string{HeaderCacheStatus: `stint;hit, "edge";fwd=uri-miss`}, 2, Call{Prompts: 2, Cache: "hit", CachedPrompts: 2}},
		{"another cache only", map[string]string{HeaderCacheStatus: `edge;hit`}, 2, Call{Prompts: 2, CachedPrompts: -1}},
		{"malformed", map[string]string{HeaderCacheStatus: `stint;hit=?2`}, 2, Call{Prompts: 2, CachedPrompts: -1}},
		// A replay is free; what the recording paid comes separately.
		{"replay", map[string]string{HeaderCacheStatus: "stint;hit;detail=replay", HeaderCost: "0", HeaderRecordedCost: "0.0002"}, 2, Call{Prompts: 2, Cache: "replay", CachedPrompts: 0, RecordedCostUSD: 0.0002}},
		{"recorded cost only on a replay", map[string]string{HeaderCacheStatus: "stint;fwd=miss;fwd-status=200", HeaderCost: "0.0001", HeaderRecordedCost: "0.0002"}, 1, Call{Prompts: 1, Cache: "miss", CostUSD: 0.0001}},
		{"bad counts ignored", map[string]string{HeaderCacheStatus: "stint;fwd=partial;fwd-status=200", HeaderCachedPrompts: "9/3", HeaderCost: "-1"}, 3, Call{Prompts: 3, Cache: "partial"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			h := http.Header{}
			for k, v := range tt.headers {
				h.Set(k, v)
			}
			got := readCall(h, tt.prompts)
			assert.Equal(t, tt.want, got, "readCall = %+v, want %+v", got, tt.want)
		})
	}
}

func TestSum(t *testing.T) {
	tot := Sum([]Call{
		{Prompts: 4, CachedPrompts: 4, Usage: Usage{PromptTokens: 40, CompletionTokens: 4, TotalTokens: 44}},
		{Prompts: 4, CachedPrompts: 1, CostUSD: 0.5, Usage: Usage{PromptTokens: 30, CompletionTokens: 4, TotalTokens: 34}},
		{Prompts: 2, CachedPrompts: -1, CostUSD: 0.25},
		{Prompts: 1, Cache: "replay", RecordedCostUSD: 0.125},
	})
	// 5 of 11 prompts cached; 70 prompt tokens; $0.75 charged, and the
	// replayed call's recorded $0.125 on top for the run's cost.
	assert.Falsef(t, tot.Calls != 4 || tot.Prompts != 11 || tot.CachedPrompts != 5 || tot.Usage.PromptTokens != 70 || tot.Usage.TotalTokens != 78 || tot.CostUSD != 0.75 || tot.RunCostUSD != 0.875, "Sum = %+v", tot)
	got := tot.CacheShare()
	assert.Equal(t, 5.0/11, got, "CacheShare = %v, want 5/11", got)
	got = (Totals{}).CacheShare()
	assert.Equal(t, 0.0, got, "empty CacheShare = %v, want 0", got)
}

func TestRetryAfter(t *testing.T) {
	now := time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)
	tests := []struct {
		v    string
		want time.Duration
	}{
		{"", 0},
		{"7", 7 * time.Second},
		// HTTP-date form, IMF-fixdate (RFC 9110 §5.6.7), 90 s after now.
		{"Sun, 01 Mar 2026 12:01:30 GMT", 90 * time.Second},
		{"Sun, 01 Mar 2026 11:00:00 GMT", 0},
		{"soon", 0},
		{"-3", 0},
	}
	for _, tt := range tests {
		got := retryAfter(tt.v, now)
		assert.Equal(t, tt.want, got, "retryAfter(%q) = %v, want %v", tt.v, got, tt.want)
	}
}

func TestForecast(t *testing.T) {
	tests := []struct {
		name          string
		texts, tokens int
		price         Price
		want          float64
	}{
		// 1,000,000 texts × 30 tokens × $0.50/M = $15; + 1,000,000 × 1 × $1.50/M = $1.50.
		{"million texts", 1_000_000, 30, Price{0.5, 1.5}, 16.5},
		// 200 steps × 16 prompts × 16 examples = 51,200 texts × 20 tokens × $2/M = $2.048; + 51,200 × $8/M = $0.4096.
		{"one search", 51_200, 20, Price{2, 8}, 2.4576},
		{"nothing", 0, 30, Price{1, 1}, 0},
	}
	for _, tt := range tests {
		got := Forecast(tt.texts, tt.tokens, tt.price)
		assert.Truef(t, closeTo(got, tt.want), "%s: Forecast = %v, want %v", tt.name, got, tt.want)
	}
	// "Ripe pears." is 11 bytes: at most 12 tokens with BOS.
	got := EstimateTokens("Ripe pears.")
	assert.Equal(t, 12, got, "EstimateTokens = %d, want 12", got)
}

func closeTo(a, b float64) bool { d := a - b; return d < 1e-9 && d > -1e-9 }

func TestNewRefuses(t *testing.T) {
	tests := []struct {
		name string
		o    Options
	}{
		{"no base", Options{Model: "m"}},
		{"no model", Options{BaseURL: "http://x/v1"}},
		{"bad endpoint", Options{BaseURL: "http://x/v1", Model: "m", Endpoint: "embeddings"}},
		{"negative", Options{BaseURL: "http://x/v1", Model: "m", Concurrency: -1}},
	}
	for _, tt := range tests {
		_, err := New(tt.o)
		assert.Error(t, err, "%s: New accepted %+v", tt.name, tt.o)
	}
}
