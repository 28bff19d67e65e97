package scorer

import (
	"encoding/json"
	"fmt"
	"net/http"
	"strconv"
	"time"

	"github.com/stintlab/stint/proxy/wire"
)

// decodeCompletions reads the first generated token's top log-probabilities
// of each of n choices, placed by choice index (prompt order, since n is 1).
func decodeCompletions(data []byte, n int) ([]map[string]float64, *Usage, error) {
	var r wire.CompletionResponse
	if err := json.Unmarshal(data, &r); err != nil {
		return nil, nil, fmt.Errorf("%w: %w", ErrAnswer, err)
	}
	if len(r.Choices) != n {
		return nil, nil, fmt.Errorf("%w: %d choices for %d prompts", ErrAnswer, len(r.Choices), n)
	}
	out := make([]map[string]float64, n)
	for _, ch := range r.Choices {
		if ch.Index < 0 || ch.Index >= n || out[ch.Index] != nil {
			return nil, nil, fmt.Errorf("%w: choice index %d out of range or repeated", ErrAnswer, ch.Index)
		}
		if ch.Logprobs == nil || len(ch.Logprobs.TopLogprobs) == 0 || ch.Logprobs.TopLogprobs[0].Len() == 0 {
			return nil, nil, fmt.Errorf("%w: choice %d has no top_logprobs", ErrAnswer, ch.Index)
		}
		out[ch.Index] = ch.Logprobs.TopLogprobs[0].Map()
	}
	return out, r.Usage, nil
}

// decodeChat reads choices[0].logprobs.content[0].top_logprobs. A token
// listed twice (two byte sequences shown alike) keeps its larger value.
func decodeChat(data []byte) ([]map[string]float64, *Usage, error) {
	var r wire.ChatResponse
	if err := json.Unmarshal(data, &r); err != nil {
		return nil, nil, fmt.Errorf("%w: %w", ErrAnswer, err)
	}
	if len(r.Choices) == 0 || r.Choices[0].Logprobs == nil || len(r.Choices[0].Logprobs.Content) == 0 ||
		len(r.Choices[0].Logprobs.Content[0].TopLogprobs) == 0 {
		return nil, nil, fmt.Errorf("%w: no logprobs.content[0].top_logprobs", ErrAnswer)
	}
	top := map[string]float64{}
	for _, t := range r.Choices[0].Logprobs.Content[0].TopLogprobs {
		if old, ok := top[t.Token]; !ok || t.Logprob > old {
			top[t.Token] = t.Logprob
		}
	}
	return []map[string]float64{top}, r.Usage, nil
}

// apiError builds the error for a non-200 answer.
func (c *Client) apiError(resp *http.Response, data []byte) error {
	e := &APIError{Status: resp.StatusCode, RetryAfter: retryAfter(resp.Header.Get("Retry-After"), c.opts.Now())}
	var body struct {
		Error *wire.ErrorDetail `json:"error"`
	}
	if json.Unmarshal(data, &body) == nil && body.Error != nil {
		e.Message, e.Type, e.Code = body.Error.Message, body.Error.Type, string(body.Error.Code)
		return e
	}
	const keep = 512
	e.Message = string(data[:min(len(data), keep)])
	return e
}

// retryAfter reads a Retry-After value: delay-seconds or an HTTP-date (RFC
// 9110 §10.2.3), relative to now. Unreadable or past values give 0.
func retryAfter(v string, now time.Time) time.Duration {
	if v == "" {
		return 0
	}
	if s, err := strconv.Atoi(v); err == nil {
		return max(time.Duration(s)*time.Second, 0)
	}
	if t, err := http.ParseTime(v); err == nil {
		return max(t.Sub(now), 0)
	}
	return 0
}
