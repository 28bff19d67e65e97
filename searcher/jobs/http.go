package jobs

import (
	"context"
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

// Service is what the job API serves: a Manager's jobs on one machine, or
// every job of sidecars sharing a queue (searcher/jobs/redisjobs).
type Service interface {
	// Submit queues a job.
	Submit(ctx context.Context, spec Spec) (Status, error)
	// List returns every job, newest first.
	List(ctx context.Context) ([]Status, error)
	// Get returns one job, or an error wrapping ErrNotFound.
	Get(ctx context.Context, id string) (Status, error)
	// Cancel stops a queued or running job for good.
	Cancel(ctx context.Context, id string) (Status, error)
	// History returns the job's learning curve so far.
	History(ctx context.Context, id string) (History, error)
	// Output returns one of a finished job's files (Outputs), or an
	// error wrapping ErrNotFound.
	Output(ctx context.Context, id, name string) ([]byte, error)
}

// Outputs are the files of a finished job that GET /jobs/{id}/out/{name}
// serves.
var Outputs = []string{"results.json", "history.csv", "report.md"}

// ErrNoOutput reports a file a job has not written (yet).
var ErrNoOutput = errors.New("jobs: no such output")

// Handler serves the job API for the manager's jobs (see NewHandler).
func (m *Manager) Handler() http.Handler { return NewHandler(local{m}) }

// NewHandler serves the job API:
//
//	POST /jobs              submit {"task": PATH, "run": ID, "over_cap": false} → 201 and the job
//	GET  /jobs              {"jobs": [...]}, newest first
//	GET  /jobs/{id}         one job: state, step, best prompt so far (by dev accuracy), accuracies, calls, cache share, spend
//	GET  /jobs/{id}/history the learning curve so far (see History)
//	GET  /jobs/{id}/out/{name} a finished job's results.json, history.csv or report.md, as written
//	POST /jobs/{id}/cancel  stop a queued or running job
//	GET  /healthz           ok
//
// Errors have the proxy's body, {"error":{"message","type","param","code"}},
// with its codes: unknown_url (404), method_not_allowed (405, with Allow),
// invalid_json and invalid_value (400), body_too_large (413),
// job_not_found and output_not_found (404), internal_error (500),
// store_unavailable (503).
func NewHandler(s Service) http.Handler {
	mux := http.NewServeMux()
	mux.HandleFunc("POST /jobs", func(w http.ResponseWriter, r *http.Request) { serveSubmit(s, w, r) })
	mux.HandleFunc("GET /jobs", func(w http.ResponseWriter, r *http.Request) {
		list, err := s.List(r.Context())
		answer(w, http.StatusOK, map[string][]Status{"jobs": list}, err)
	})
	mux.HandleFunc("GET /jobs/{id}", func(w http.ResponseWriter, r *http.Request) {
		st, err := s.Get(r.Context(), r.PathValue("id"))
		answer(w, http.StatusOK, st, err)
	})
	mux.HandleFunc("GET /jobs/{id}/history", func(w http.ResponseWriter, r *http.Request) {
		h, err := s.History(r.Context(), r.PathValue("id"))
		answer(w, http.StatusOK, h, err)
	})
	mux.HandleFunc("GET /jobs/{id}/out/{name}", func(w http.ResponseWriter, r *http.Request) {
		serveOutput(s, w, r)
	})
	mux.HandleFunc("POST /jobs/{id}/cancel", func(w http.ResponseWriter, r *http.Request) {
		st, err := s.Cancel(r.Context(), r.PathValue("id"))
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

func serveSubmit(s Service, w http.ResponseWriter, r *http.Request) {
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
	st, err := s.Submit(r.Context(), spec)
	var unavailable *UnavailableError
	switch {
	case errors.As(err, &unavailable):
		answer(w, 0, nil, err)
		return
	case err != nil:
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

// serveOutput answers one of a finished job's files as it was written.
func serveOutput(s Service, w http.ResponseWriter, r *http.Request) {
	name := r.PathValue("name")
	known := false
	for _, o := range Outputs {
		known = known || o == name
	}
	if !known {
		writeError(w, http.StatusNotFound, "output_not_found", "name", fmt.Sprintf("a job's outputs are %s, not %q", strings.Join(Outputs, ", "), name))
		return
	}
	b, err := s.Output(r.Context(), r.PathValue("id"), name)
	if err != nil {
		answer(w, 0, nil, err)
		return
	}
	switch {
	case strings.HasSuffix(name, ".json"):
		w.Header().Set("Content-Type", "application/json")
	case strings.HasSuffix(name, ".csv"):
		w.Header().Set("Content-Type", "text/csv; charset=utf-8")
	default:
		w.Header().Set("Content-Type", "text/markdown; charset=utf-8")
	}
	_, _ = w.Write(b)
}

// UnavailableError is a store the job API could not reach (the shared
// Redis of a fleet); the API answers it with 503.
type UnavailableError struct{ Err error }

func (e *UnavailableError) Error() string {
	return "jobs: the job store is unavailable: " + e.Err.Error()
}

// Unwrap returns the store's error.
func (e *UnavailableError) Unwrap() error { return e.Err }

func answer(w http.ResponseWriter, status int, v any, err error) {
	var unavailable *UnavailableError
	switch {
	case errors.Is(err, ErrNotFound):
		writeError(w, http.StatusNotFound, "job_not_found", "", err.Error())
	case errors.Is(err, ErrNoOutput):
		writeError(w, http.StatusNotFound, "output_not_found", "", err.Error())
	case errors.As(err, &unavailable):
		w.Header().Set("Retry-After", "1")
		writeError(w, http.StatusServiceUnavailable, "store_unavailable", "", err.Error())
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
