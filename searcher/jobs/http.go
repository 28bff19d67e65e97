package jobs

import (
	"encoding/json"
	"errors"
	"net/http"
)

// maxSpecBytes bounds a submitted spec.
const maxSpecBytes = 64 << 10

// Handler serves the job API:
//
//	POST /jobs              submit {"task": PATH, "run": ID, "over_cap": false} → 201 and the job
//	GET  /jobs              {"jobs": [...]}, newest first
//	GET  /jobs/{id}         one job: state, step, best prompt so far (by dev accuracy), accuracies, calls, cache share, spend
//	GET  /jobs/{id}/history the learning curve so far (see History)
//	POST /jobs/{id}/cancel  stop a queued or running job
//	GET  /healthz           ok
func (m *Manager) Handler() http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("POST /jobs", m.serveSubmit)
	mux.HandleFunc("GET /jobs", func(w http.ResponseWriter, _ *http.Request) {
		writeJSON(w, http.StatusOK, map[string][]Status{"jobs": m.List()})
	})
	mux.HandleFunc("GET /jobs/{id}", func(w http.ResponseWriter, r *http.Request) {
		st, err := m.Get(r.PathValue("id"))
		answer(w, http.StatusOK, st, err)
	})
	mux.HandleFunc("GET /jobs/{id}/history", m.serveHistory)
	mux.HandleFunc("POST /jobs/{id}/cancel", func(w http.ResponseWriter, r *http.Request) {
		st, err := m.Cancel(r.PathValue("id"))
		answer(w, http.StatusOK, st, err)
	})
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) { _, _ = w.Write([]byte("ok\n")) })
	return mux
}

func (m *Manager) serveSubmit(w http.ResponseWriter, r *http.Request) {
	dec := json.NewDecoder(http.MaxBytesReader(w, r.Body, maxSpecBytes))
	dec.DisallowUnknownFields()
	var spec Spec
	if err := dec.Decode(&spec); err != nil {
		writeError(w, http.StatusBadRequest, "job spec: "+err.Error()+` (want {"task": "/path/to/task.yaml"})`)
		return
	}
	st, err := m.Submit(spec)
	if err != nil {
		writeError(w, http.StatusBadRequest, err.Error())
		return
	}
	writeJSON(w, http.StatusCreated, st)
}

func answer(w http.ResponseWriter, status int, v any, err error) {
	switch {
	case errors.Is(err, ErrNotFound):
		writeError(w, http.StatusNotFound, err.Error())
	case err != nil:
		writeError(w, http.StatusInternalServerError, err.Error())
	default:
		writeJSON(w, status, v)
	}
}

func writeError(w http.ResponseWriter, status int, msg string) {
	writeJSON(w, status, map[string]map[string]string{"error": {"message": msg}})
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	b, _ := json.Marshal(v)
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(status)
	_, _ = w.Write(append(b, '\n'))
}
