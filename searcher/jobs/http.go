package jobs

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"strings"
)

// maxSpecBytes bounds a submitted spec.
const maxSpecBytes = 64 << 10

// specShape is what a job spec looks like, for error messages.
const specShape = `{"task": "/path/task.yaml", "run": "ID", "over_cap": false}`

// Handler serves the job API:
//
//	POST /jobs              submit {"task": PATH, "run": ID, "over_cap": false} → 201 and the job
//	GET  /jobs              {"jobs": [...]}, newest first
//	GET  /jobs/{id}         one job: state, step, best prompt so far (by dev accuracy), accuracies, calls, cache share, spend
//	GET  /jobs/{id}/history the learning curve so far (see History)
//	POST /jobs/{id}/cancel  stop a queued or running job
//	GET  /healthz           ok
//
// Errors have the proxy's body, {"error":{"message","type","param","code"}},
// with its codes: unknown_url (404), method_not_allowed (405, with Allow),
// invalid_json and invalid_value (400), body_too_large (413),
// job_not_found (404), internal_error (500).
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
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) {
		w.Header().Set("Content-Type", "text/plain; charset=utf-8")
		_, _ = io.WriteString(w, "ok\n")
	})
	mux.HandleFunc("/", func(w http.ResponseWriter, r *http.Request) {
		if allow := allowedMethods(mux, r); len(allow) > 0 {
			w.Header().Set("Allow", strings.Join(allow, ", "))
			writeError(w, http.StatusMethodNotAllowed, "method_not_allowed", "",
				fmt.Sprintf("%s is not allowed on %s; use %s", r.Method, r.URL.Path, strings.Join(allow, " or ")))
			return
		}
		writeError(w, http.StatusNotFound, "unknown_url", "", fmt.Sprintf("no route for %s %s", r.Method, r.URL.Path))
	})
	return mux
}

// allowedMethods lists the methods other than r's that mux routes r's path
// for, other than to its catch-all "/" (RFC 9110 §15.5.6: a 405 says
// Allow).
func allowedMethods(mux *http.ServeMux, r *http.Request) []string {
	var allow []string
	for _, method := range []string{http.MethodGet, http.MethodHead, http.MethodPost, http.MethodPut, http.MethodPatch, http.MethodDelete} {
		if method == r.Method {
			continue
		}
		probe := &http.Request{Method: method, URL: r.URL, Host: r.Host, Header: http.Header{}}
		if _, pattern := mux.Handler(probe); pattern != "" && pattern != "/" {
			allow = append(allow, method)
		}
	}
	return allow
}

func (m *Manager) serveSubmit(w http.ResponseWriter, r *http.Request) {
	dec := json.NewDecoder(http.MaxBytesReader(w, r.Body, maxSpecBytes))
	dec.DisallowUnknownFields()
	var spec Spec
	if err := dec.Decode(&spec); err != nil {
		writeSpecError(w, err)
		return
	}
	if spec.Task == "" {
		writeError(w, http.StatusBadRequest, "invalid_value", "task", "the job spec needs a task file path: "+specShape)
		return
	}
	st, err := m.Submit(spec)
	if err != nil {
		writeError(w, http.StatusBadRequest, "invalid_value", "task", err.Error())
		return
	}
	writeJSON(w, http.StatusCreated, st)
}

// writeSpecError says why a job spec could not be read, naming the field,
// never Go's types.
func writeSpecError(w http.ResponseWriter, err error) {
	var se *json.SyntaxError
	var te *json.UnmarshalTypeError
	var tooBig *http.MaxBytesError
	switch {
	case errors.As(err, &tooBig):
		writeError(w, http.StatusRequestEntityTooLarge, "body_too_large", "", fmt.Sprintf("a job spec is at most %d bytes", maxSpecBytes))
	case errors.As(err, &se):
		writeError(w, http.StatusBadRequest, "invalid_json", "", fmt.Sprintf("the job spec is not valid JSON: %s (at byte %d); want %s", se.Error(), se.Offset, specShape))
	case errors.As(err, &te) && te.Field != "":
		writeError(w, http.StatusBadRequest, "invalid_value", te.Field, fmt.Sprintf("%s has the wrong kind of value (%s); want %s", te.Field, te.Value, specShape))
	case errors.As(err, &te):
		writeError(w, http.StatusBadRequest, "invalid_json", "", fmt.Sprintf("the job spec must be a JSON object, not %s; want %s", te.Value, specShape))
	case strings.HasPrefix(err.Error(), "json: unknown field "):
		field := strings.Trim(strings.TrimPrefix(err.Error(), "json: unknown field "), `"`)
		writeError(w, http.StatusBadRequest, "invalid_value", field, fmt.Sprintf("the job spec has no field %q; want %s", field, specShape))
	default:
		writeError(w, http.StatusBadRequest, "invalid_json", "", "the job spec is not valid JSON; want "+specShape)
	}
}

func answer(w http.ResponseWriter, status int, v any, err error) {
	switch {
	case errors.Is(err, ErrNotFound):
		writeError(w, http.StatusNotFound, "job_not_found", "", err.Error())
	case err != nil:
		writeError(w, http.StatusInternalServerError, "internal_error", "", err.Error())
	default:
		writeJSON(w, status, v)
	}
}

// apiError is the error body the proxy answers with:
// {"error":{"message","type","param","code"}}.
type apiError struct {
	Error struct {
		Message string  `json:"message"`
		Type    string  `json:"type"`
		Param   *string `json:"param"`
		Code    string  `json:"code"`
	} `json:"error"`
}

// writeError writes an error with code (its type follows from the
// status) naming the field param ("" for none).
func writeError(w http.ResponseWriter, status int, code, param, msg string) {
	var e apiError
	e.Error.Message, e.Error.Code, e.Error.Type = msg, code, "invalid_request_error"
	if status >= 500 {
		e.Error.Type = "server_error"
	}
	if param != "" {
		e.Error.Param = &param
	}
	writeJSON(w, status, e)
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	b, _ := json.Marshal(v)
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(status)
	_, _ = w.Write(append(b, '\n'))
}
