package proxy

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/sony/gobreaker/v2"

	"github.com/stintlab/stint/proxy/breaker"
)

// HeaderModelsMissing lists, comma-separated, the upstreams whose model
// lists a merged GET /v1/models answer lacks because they failed (or their
// breaker was open); absent when every list came.
const HeaderModelsMissing = "Stint-Models-Missing"

// modelsTimeout bounds fetching the upstreams' model lists.
const modelsTimeout = 30 * time.Second

// serveModels answers GET /v1/models from the upstreams, merged when there
// are several, and reuses the answer for ModelsTTL.
func (p *Proxy) serveModels(w http.ResponseWriter, r *http.Request) {
	_, _, release, aerr := p.enter(w, r)
	if aerr != nil {
		return
	}
	defer release()
	p.modelsMu.Lock()
	body, code, missing, at := p.modelsBody, p.modelsCode, p.modelsMissing, p.modelsAt
	p.modelsMu.Unlock()
	outcome := OutcomeHit
	if body == nil || p.modelsTTL < 0 || p.now().Sub(at) > p.modelsTTL {
		outcome = OutcomeMiss
		ctx, cancel := context.WithTimeout(r.Context(), modelsTimeout)
		defer cancel()
		var err error
		body, code, missing, err = p.fetchModels(ctx)
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
			p.modelsBody, p.modelsCode, p.modelsMissing, p.modelsAt = body, code, missing, p.now()
			p.modelsMu.Unlock()
		}
	}
	h := w.Header()
	h.Set("Content-Type", "application/json")
	h.Set("Content-Length", strconv.Itoa(len(body)))
	cs := CacheStatus{Hit: true}
	if outcome == OutcomeMiss {
		cs = CacheStatus{Fwd: FwdMiss, FwdStatus: code, Stored: code == http.StatusOK && p.modelsTTL >= 0}
	}
	h.Set(HeaderCacheStatus, cs.String())
	if len(missing) > 0 {
		h.Set(HeaderModelsMissing, strings.Join(missing, ", "))
	}
	w.WriteHeader(code)
	_, _ = w.Write(body)
}

// modelList is one upstream's answer to GET /models.
type modelList struct {
	body []byte
	code int
	err  error
}

// fetchModels returns one upstream's model list as is, or the lists of
// several merged: fetched at once, deduplicated by id (the first upstream
// in order wins), leaving out, and naming in missing, those that failed or
// whose breaker is open. Only when every list failed is the answer an
// error.
func (p *Proxy) fetchModels(ctx context.Context) ([]byte, int, []string, error) {
	if len(p.upstreams) == 1 {
		b, code, err := p.upstreams[0].get(ctx, "/models")
		return b, code, nil, err
	}
	lists := make([]modelList, len(p.upstreams))
	var wg sync.WaitGroup
	for i := range p.upstreams {
		u := &p.upstreams[i]
		if st, _ := u.rt.breaker.State(); st == gobreaker.StateOpen {
			lists[i].err = &upstreamError{err: breaker.ErrOpen}
			continue
		}
		wg.Go(func() {
			b, code, err := u.get(ctx, "/models")
			lists[i] = modelList{body: b, code: code, err: err}
		})
	}
	wg.Wait()
	seen := map[string]bool{}
	data := []json.RawMessage{}
	var missing []string
	var firstErr error
	for i, l := range lists {
		name := p.upstreams[i].Name
		err := l.err
		if err == nil && l.code != http.StatusOK {
			err = fmt.Errorf("upstream %s answered %d", name, l.code)
		}
		var list struct {
			Data []json.RawMessage `json:"data"`
		}
		if err == nil {
			if uerr := json.Unmarshal(l.body, &list); uerr != nil {
				err = fmt.Errorf("upstream %s model list: %w", name, uerr)
			}
		}
		if err != nil {
			missing = append(missing, name)
			if firstErr == nil {
				firstErr = err
			}
			p.resil.m.modelErrors.WithLabelValues(name).Inc()
			p.log.Warn("model list left out of /v1/models", "upstream", name, "err", err)
			continue
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
	if len(missing) == len(lists) {
		var ue *upstreamError
		if errors.As(firstErr, &ue) {
			return nil, 0, nil, ue
		}
		return nil, 0, nil, &upstreamError{err: firstErr}
	}
	b, err := json.Marshal(map[string]any{"object": "list", "data": data})
	return b, http.StatusOK, missing, err
}
