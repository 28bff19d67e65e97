package upstreamtest

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strings"

	"github.com/stintlab/stint/proxy/wire"
)

// apiError is an error answer in the wire format's shape.
type apiError struct {
	status int
	body   wire.ErrorDetail
}

func (e *apiError) Error() string { return e.body.Message }

// invalid returns a 400 invalid_request_error naming param ("" for none).
func invalid(param, format string, args ...any) *apiError {
	e := &apiError{status: http.StatusBadRequest, body: wire.ErrorDetail{Message: fmt.Sprintf(format, args...), Type: "invalid_request_error"}}
	if param != "" {
		e.body.Param = &param
	}
	return e
}

// withCode sets the error's code.
func (e *apiError) withCode(code string) *apiError {
	e.body.Code = wire.ErrorCode(code)
	return e
}

func writeError(w http.ResponseWriter, e *apiError) { responder{w: w}.error(e) }

// decodeBody decodes a JSON object into v, mapping errors to 400s.
func decodeBody(body []byte, v any) *apiError {
	err := json.Unmarshal(body, v)
	if err == nil {
		return nil
	}
	var typeErr *json.UnmarshalTypeError
	if errors.As(err, &typeErr) {
		if typeErr.Field == "" {
			return invalid("", "The request body must be a JSON object.")
		}
		field := typeErr.Field
		if field == "messages" || strings.HasPrefix(field, "messages.") {
			return invalid("messages", "Invalid type for 'messages': expected an array of message objects.")
		}
		return invalid(field, "Invalid type for '%s': expected %s, but got %s.", field, typeErr.Type, typeErr.Value)
	}
	return invalid("", "We could not parse the JSON body of your request: %v", err)
}

// common holds the request fields both generation endpoints share.
type common struct {
	Model         string
	Temperature   *float64
	TopP          *float64
	N             *int
	Seed          *int64
	Stop          json.RawMessage
	Stream        bool
	StreamOptions *wire.StreamOptions
}

// commonOf gathers the shared fields of a completions or chat request.
func commonOf(model string, temperature, topP *float64, n *int, seed *int64, stop json.RawMessage, stream bool, so *wire.StreamOptions) *common {
	return &common{Model: model, Temperature: temperature, TopP: topP, N: n, Seed: seed, Stop: stop, Stream: stream, StreamOptions: so}
}

// settings are validated generation settings.
type settings struct {
	model       string
	temperature float64
	topP        float64
	n           int
	seed        *int64
	stops       []string
	stream      bool
	usage       bool // stream_options.include_usage
}

// decode decodes body into req, validates the fields both endpoints share
// (which shared reads from req once decoded) and finds the model they name.
func (s *Server) decode(body []byte, req any, shared func() *common) (settings, *model, *apiError) {
	if err := decodeBody(body, req); err != nil {
		return settings{}, nil, err
	}
	st, err := shared().validate()
	if err != nil {
		return st, nil, err
	}
	m, err := s.modelFor(st.model)
	return st, m, err
}

// Limits the fake enforces, like a real API.
const (
	maxN          = 128
	maxStops      = 4
	contextTokens = 16384
)

func (c *common) validate() (settings, *apiError) {
	s := settings{temperature: 1, topP: 1, n: 1, seed: c.Seed}
	if c.Model == "" {
		return s, invalid("model", "you must provide a model parameter")
	}
	s.model = c.Model
	if c.Temperature != nil {
		if *c.Temperature < 0 || *c.Temperature > 2 {
			return s, invalid("temperature", "%g is not valid for 'temperature': expected a value between 0 and 2.", *c.Temperature).withCode("invalid_value")
		}
		s.temperature = *c.Temperature
	}
	if c.TopP != nil {
		if *c.TopP < 0 || *c.TopP > 1 {
			return s, invalid("top_p", "%g is not valid for 'top_p': expected a value between 0 and 1.", *c.TopP).withCode("invalid_value")
		}
		s.topP = *c.TopP
	}
	if c.N != nil {
		if *c.N < 1 || *c.N > maxN {
			return s, invalid("n", "%d is not valid for 'n': expected a value between 1 and %d.", *c.N, maxN).withCode("invalid_value")
		}
		s.n = *c.N
	}
	stops, err := parseStop(c.Stop)
	if err != nil {
		return s, err
	}
	s.stops = stops
	s.stream = c.Stream
	if c.StreamOptions != nil {
		if !s.stream {
			return s, invalid("stream_options", "The 'stream_options' parameter is only allowed when 'stream' is enabled.")
		}
		s.usage = c.StreamOptions.IncludeUsage
	}
	return s, nil
}

// parseStop parses "stop": null, a string, or an array of up to four
// strings.
func parseStop(raw json.RawMessage) ([]string, *apiError) {
	many, ok := wire.ParseStop(raw)
	if !ok {
		return nil, invalid("stop", "Invalid type for 'stop': expected a string or an array of strings.")
	}
	if len(many) > maxStops {
		return nil, invalid("stop", "'stop' may hold at most %d sequences; got %d.", maxStops, len(many))
	}
	return many, nil
}
