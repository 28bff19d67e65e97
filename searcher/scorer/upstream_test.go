package scorer

import (
	"context"
	"errors"
	"net/http"
	"strings"
	"testing"
	"time"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

var barges = []string{"The barge", "Every hive hums", "The river bends", "A queen rests", "The keeper sings"}

func TestHeadersSent(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{Key: "up-key"})
	defer up.Close()
	for _, ep := range []Endpoint{Completions, Chat} {
		t.Run(string(ep), func(t *testing.T) {
			up.Reset()
			c := newClient(t, Options{BaseURL: up.URL(), Key: "up-key", Run: "run-7", Model: upstreamtest.ModelSmall, Endpoint: ep, TopLogprobs: 5, BatchSize: 2})
			res, err := c.Score(context.Background(), barges)
			require.NoError(t, err)
			wantCalls := map[Endpoint]int{Completions: 3, Chat: 5}[ep] // ⌈5/2⌉ batches; one per text
			require.Falsef(t, len(res.Calls) != wantCalls || up.Calls().Total() != wantCalls, "calls = %d (upstream saw %d), want %d", len(res.Calls), up.Calls().Total(), wantCalls)
			for _, r := range up.Requests() {
				got := r.Header.Get(HeaderRun)
				assert.Equal(t, "run-7", got, "%s: Stint-Run = %q, want run-7", r.Path, got)
				assert.Falsef(t, !strings.Contains(string(r.Body), `"max_tokens":1`) || !strings.Contains(string(r.Body), `"temperature":0`), "%s: body %s lacks max_tokens 1 or temperature 0", r.Path, r.Body)
			}
			// upstreamtest: top_logprobs hold exactly k entries.
			for i, m := range res.Top {
				assert.Len(t, m, 5, "text %d: %d log-probabilities, want 5", i, len(m))
			}
			assert.False(t, Sum(res.Calls).Usage.PromptTokens == 0, "usage not read")
		})
	}
	// A wrong key is the fake's 401 (invalid_api_key), surfaced as ErrStatus.
	_, err := newClient(t, Options{BaseURL: up.URL(), Key: "wrong", Model: upstreamtest.ModelSmall}).Score(context.Background(), barges[:1])
	var ae *APIError
	assert.Falsef(t, !errors.As(err, &ae) || ae.Status != http.StatusUnauthorized || ae.Code != "invalid_api_key" || !errors.Is(err, ErrStatus), "wrong key: err = %v", err)
}

func TestErrorStatuses(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	tests := []struct {
		name  string
		fault upstreamtest.Fault
		want  error
		retry time.Duration
		msg   string
	}{
		{"budget", upstreamtest.Fault{Status: 402, Body: `{"error":{"message":"budget exhausted: $0.00 left","type":"budget_error","code":"budget_exhausted"}}`},
			ErrBudget, 0, "budget exhausted: $0.00 left"},
		// Retry-After in delay-seconds (RFC 9110 §10.2.3).
		{"rate limited", upstreamtest.Fault{Status: 429, RetryAfter: "7"}, ErrRateLimited, 7 * time.Second, "injected fault: 429"},
		{"unavailable", upstreamtest.Fault{Status: 503, RetryAfter: "2"}, ErrUnavailable, 2 * time.Second, "injected fault: 503"},
		{"other", upstreamtest.Fault{Status: 500}, ErrStatus, 0, "injected fault: 500"},
		{"not json", upstreamtest.Fault{Status: 502, Body: "bad gateway"}, ErrStatus, 0, "bad gateway"},
		{"cut answer", upstreamtest.Fault{Cut: 10}, nil, 0, ""},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			up.ClearFaults()
			up.FailNext(1, tt.fault)
			_, err := newClient(t, Options{BaseURL: up.URL(), Model: upstreamtest.ModelSmall, TopLogprobs: 3}).Score(context.Background(), barges[:2])
			require.Error(t, err, "no error")
			if tt.want == nil {
				return // a cut body: any error will do, as long as there is one
			}
			var ae *APIError
			require.Falsef(t, !errors.Is(err, tt.want) || !errors.As(err, &ae), "err = %v, want %v", err, tt.want)
			assert.Falsef(t, ae.RetryAfter != tt.retry || !strings.Contains(ae.Message, tt.msg), "retry %v message %q; want %v, %q", ae.RetryAfter, ae.Message, tt.retry, tt.msg)
		})
	}
}

func TestAnswerTooLarge(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	_, err := newClient(t, Options{BaseURL: up.URL(), Model: upstreamtest.ModelSmall, MaxResponseBytes: 64}).Score(context.Background(), barges[:1])
	assert.ErrorIs(t, err, ErrTooLarge, "err = %v, want ErrTooLarge", err)
}

func TestCancel(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.Block()
	defer up.Release()
	ctx, cancel := context.WithCancel(context.Background())
	c := newClient(t, Options{BaseURL: up.URL(), Model: upstreamtest.ModelSmall, BatchSize: 1, Concurrency: 2})
	done := make(chan error, 1)
	go func() {
		_, err := c.Score(ctx, barges)
		done <- err
	}()
	wait, stop := context.WithTimeout(context.Background(), time.Minute)
	defer stop()
	require.NoError(t, up.AwaitHeld(wait, 2))
	cancel()
	err := <-done
	assert.ErrorIs(t, err, context.Canceled, "err = %v, want context.Canceled", err)
	// Two calls were in flight when the context ended, and no more started.
	got := up.Calls().Completions
	assert.Equal(t, 2, got, "upstream saw %d calls, want 2", got)
}

func TestConcurrencyBound(t *testing.T) {
	up := upstreamtest.New(upstreamtest.Options{})
	defer up.Close()
	up.Block()
	c := newClient(t, Options{BaseURL: up.URL(), Model: upstreamtest.ModelSmall, BatchSize: 1, Concurrency: 2})
	done := make(chan error, 1)
	go func() {
		_, err := c.Score(context.Background(), barges)
		done <- err
	}()
	wait, stop := context.WithTimeout(context.Background(), time.Minute)
	defer stop()
	require.NoError(t, up.AwaitHeld(wait, 2))
	up.Release()
	require.NoError(t, <-done)
	c.mu.Lock()
	peak := c.peak
	c.mu.Unlock()
	assert.Falsef(t, peak != 2 || up.Calls().Completions != len(barges), "peak in flight %d (want 2), calls %d (want %d)", peak, up.Calls().Completions, len(barges))
}
