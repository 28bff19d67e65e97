package upstreamtest

import (
	"encoding/json"
	"errors"
	"fmt"
	"net/http"
	"strings"
)

// apiError is an error answer in the wire format's shape.
type apiError struct {
	status int
	body   errorBody
}

type errorBody struct {
	Message string  `json:"message"`
	Type    string  `json:"type"`
	Param   *string `json:"param"`
	Code    *string `json:"code"`
}

func (e *apiError) Error() string { return e.body.Message }

// invalid returns a 400 invalid_request_error naming param ("" for none).
func invalid(param, format string, args ...any) *apiError {
	e := &apiError{status: http.StatusBadRequest, body: errorBody{Message: fmt.Sprintf(format, args...), Type: "invalid_request_error"}}
	if param != "" {
		e.body.Param = &param
	}
	return e
}

// withCode sets the error's code.
func (e *apiError) withCode(code string) *apiError {
	e.body.Code = &code
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
		field := strings.TrimPrefix(typeErr.Field, "common.") // the embedded struct
		return invalid(field, "Invalid type for '%s': expected %s, but got %s.", field, typeErr.Type, typeErr.Value)
	}
	return invalid("", "We could not parse the JSON body of your request: %v", err)
}

// usage is the token accounting of an answer.
type usage struct {
	PromptTokens     int `json:"prompt_tokens"`
	CompletionTokens int `json:"completion_tokens"`
	TotalTokens      int `json:"total_tokens"`
}

func newUsage(prompt, completion int) *usage {
	return &usage{PromptTokens: prompt, CompletionTokens: completion, TotalTokens: prompt + completion}
}

// streamOptions is the request's stream_options object.
type streamOptions struct {
	IncludeUsage bool `json:"include_usage"`
}

// common holds the request fields both generation endpoints share.
type common struct {
	Model         *string         `json:"model"`
	Temperature   *float64        `json:"temperature"`
	TopP          *float64        `json:"top_p"`
	N             *int            `json:"n"`
	Seed          *int64          `json:"seed"`
	Stop          json.RawMessage `json:"stop"`
	Stream        *bool           `json:"stream"`
	StreamOptions *streamOptions  `json:"stream_options"`
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

// Limits the fake enforces, like a real API.
const (
	maxN          = 128
	maxStops      = 4
	contextTokens = 16384
)

func (c *common) validate() (settings, *apiError) {
	s := settings{temperature: 1, topP: 1, n: 1, seed: c.Seed}
	if c.Model == nil || *c.Model == "" {
		return s, invalid("model", "you must provide a model parameter")
	}
	s.model = *c.Model
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
	s.stream = c.Stream != nil && *c.Stream
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
	if len(raw) == 0 || string(raw) == "null" {
		return nil, nil
	}
	var one string
	if json.Unmarshal(raw, &one) == nil {
		return []string{one}, nil
	}
	var many []string
	if err := json.Unmarshal(raw, &many); err != nil {
		return nil, invalid("stop", "Invalid type for 'stop': expected a string or an array of strings.")
	}
	if len(many) > maxStops {
		return nil, invalid("stop", "'stop' may hold at most %d sequences; got %d.", maxStops, len(many))
	}
	return many, nil
}

// tokenBytes returns the UTF-8 bytes of t as the numbers the wire format
// uses for "bytes".
func tokenBytes(t string) []int {
	out := make([]int, len(t))
	for i := range len(t) {
		out[i] = int(t[i])
	}
	return out
}
