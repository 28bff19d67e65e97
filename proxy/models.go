package proxy

import (
	"context"
	"encoding/json"
	"net/http"
	"strconv"
	"time"
)

// serveModels answers GET /v1/models from the upstreams, merged when there
// are several, and reuses the answer for ModelsTTL.
func (p *Proxy) serveModels(w http.ResponseWriter, r *http.Request) {
	if _, _, aerr := p.authenticate(r); aerr != nil {
		writeError(w, aerr)
		return
	}
	p.modelsMu.Lock()
	body, code, at := p.modelsBody, p.modelsCode, p.modelsAt
	p.modelsMu.Unlock()
	outcome := OutcomeHit
	if body == nil || p.modelsTTL < 0 || p.now().Sub(at) > p.modelsTTL {
		outcome = OutcomeMiss
		ctx, cancel := context.WithTimeout(r.Context(), 30*time.Second)
		defer cancel()
		var err error
		body, code, err = p.fetchModels(ctx)
		if err != nil {
			if ue, ok := err.(*upstreamError); ok {
				writeError(w, ue.apiError())
				return
			}
			writeError(w, &apiError{status: http.StatusBadGateway, typ: errUpstream, message: err.Error()})
			return
		}
		if code == http.StatusOK {
			p.modelsMu.Lock()
			p.modelsBody, p.modelsCode, p.modelsAt = body, code, p.now()
			p.modelsMu.Unlock()
		}
	}
	h := w.Header()
	h.Set("Content-Type", "application/json")
	h.Set("Content-Length", strconv.Itoa(len(body)))
	h.Set(HeaderCache, outcome)
	w.WriteHeader(code)
	_, _ = w.Write(body)
}

// fetchModels returns one upstream's model list as is, or the lists of
// several merged (first upstream wins on a duplicate id).
func (p *Proxy) fetchModels(ctx context.Context) ([]byte, int, error) {
	if len(p.upstreams) == 1 {
		return p.upstreams[0].get(ctx, "/models")
	}
	seen := map[string]bool{}
	var data []json.RawMessage
	for i := range p.upstreams {
		b, code, err := p.upstreams[i].get(ctx, "/models")
		if err != nil {
			return nil, 0, err
		}
		if code != http.StatusOK {
			return b, code, nil
		}
		var list struct {
			Data []json.RawMessage `json:"data"`
		}
		if err := json.Unmarshal(b, &list); err != nil {
			return nil, 0, &upstreamError{err: err}
		}
		for _, m := range list.Data {
			var id struct {
				ID string `json:"id"`
			}
			_ = json.Unmarshal(m, &id)
			if !seen[id.ID] {
				seen[id.ID] = true
				data = append(data, m)
			}
		}
	}
	if data == nil {
		data = []json.RawMessage{}
	}
	b, err := json.Marshal(map[string]any{"object": "list", "data": data})
	return b, http.StatusOK, err
}
