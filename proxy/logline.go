package proxy

import (
	"context"
	"log/slog"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// logLine gathers what the request's log line reports.
type logLine struct {
	team, model, outcome string
	endpoint             endpoint
	status               int
	upstream             time.Duration
	usage                wire.Usage
	prompts, hits        int
	promptText           string
	// storeDown notes that the cache store failed during the request (see
	// storeFailed).
	storeDown bool
	// For Cache-Status: the key of a single-prompt request, when the oldest
	// answer served from the cache was stored (Unix seconds), whether the
	// request said no-cache, and whether the upstream's answer is stored.
	key      string
	storedAt int64
	noCache  bool
	stored   bool
}

// finish counts the request in the metrics and writes its log line.
func (p *Proxy) finish(ll *logLine, start time.Time) {
	end := p.now()
	d := end.Sub(start)
	if ll.outcome != "" && ll.outcome != "error" {
		ms := p.metrics.series(ll.team, string(ll.endpoint), ll.outcome)
		ms.requests.Inc()
		ms.seconds.Observe(d.Seconds())
		ms.promptTokens.Add(float64(ll.usage.PromptTokens))
		ms.completionTokens.Add(float64(ll.usage.CompletionTokens))
	}
	if p.requestLog != nil {
		p.requestLog.write(end, ll, d)
		return
	}
	if !p.log.Enabled(context.Background(), slog.LevelInfo) {
		return
	}
	attrs := make([]slog.Attr, 0, 14)
	attrs = append(attrs,
		slog.String("team", ll.team), slog.String("endpoint", string(ll.endpoint)), slog.String("model", ll.model),
		slog.String("cache", ll.outcome), slog.Int("status", ll.status), slog.Int("prompts", ll.prompts), slog.Int("cached_prompts", ll.hits),
		slog.Int("prompt_tokens", ll.usage.PromptTokens), slog.Int("completion_tokens", ll.usage.CompletionTokens),
		slog.Int64("upstream_us", ll.upstream.Microseconds()), slog.Int64("duration_us", d.Microseconds()),
	)
	if ll.promptText != "" {
		attrs = append(attrs, slog.String("prompt", ll.promptText))
	}
	p.log.LogAttrs(context.Background(), slog.LevelInfo, "request", attrs...)
}

func promptText(req *request) string {
	if req.endpoint == endpointChat {
		return string(req.fields["messages"])
	}
	return string(req.fields["prompt"])
}
