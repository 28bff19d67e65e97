package localmodel

import (
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"reflect"

	"github.com/stintlab/stint/proxy/wire"
)

// errBadRequest marks request errors (400).
var errBadRequest = errors.New("invalid request")

// requestError is a request error naming the field at fault (param, ""
// for none); it matches errBadRequest.
type requestError struct {
	param, msg string
}

func (e *requestError) Error() string { return e.msg }

func (e *requestError) Is(target error) bool { return target == errBadRequest }

func badRequest(format string, args ...any) error {
	return &requestError{msg: fmt.Sprintf(format, args...)}
}

// badParam is badRequest for the field param.
func badParam(param, format string, args ...any) error {
	return &requestError{param: param, msg: fmt.Sprintf(format, args...)}
}

// describeJSONError says why a request body could not be decoded, in the
// wire format's words (the field and the kind of value it wants), never
// with Go's types; param is the field at fault, "" for the body.
func describeJSONError(err error) (msg, param string) {
	var se *json.SyntaxError
	var te *json.UnmarshalTypeError
	switch {
	case errors.As(err, &se):
		return fmt.Sprintf("request body is not valid JSON: %s (at byte %d)", se.Error(), se.Offset), ""
	case errors.As(err, &te) && te.Field != "":
		return fmt.Sprintf("%s must be %s, not %s", te.Field, kindName(te.Type.Kind()), withArticle(te.Value)), te.Field
	case errors.As(err, &te):
		return fmt.Sprintf("request body must be a JSON object, not %s", withArticle(te.Value)), ""
	case errors.Is(err, io.ErrUnexpectedEOF), errors.Is(err, io.EOF):
		return "request body is not valid JSON: it ends before the value does", ""
	}
	return "request body is not valid JSON", ""
}

// kindName names what a Go kind holds, in JSON's terms.
func kindName(k reflect.Kind) string {
	switch k {
	case reflect.String:
		return "a string"
	case reflect.Bool:
		return "true or false"
	case reflect.Int, reflect.Int8, reflect.Int16, reflect.Int32, reflect.Int64, reflect.Uint, reflect.Uint8, reflect.Uint16, reflect.Uint32, reflect.Uint64:
		return "a whole number"
	case reflect.Float32, reflect.Float64:
		return "a number"
	case reflect.Slice, reflect.Array:
		return "an array"
	case reflect.Map, reflect.Struct:
		return "an object"
	}
	return "another kind of value"
}

// withArticle puts "a" or "an" before a kind encoding/json reports.
func withArticle(kind string) string {
	switch kind {
	case "array", "object":
		return "an " + kind
	case "bool":
		return "a boolean"
	}
	return "a " + kind
}

// parseStop reads stop as null, a string or an array of up to 16 strings,
// leaving out empty ones.
func parseStop(raw json.RawMessage) ([]string, error) {
	many, ok := wire.ParseStop(raw)
	if !ok {
		return nil, badRequest("stop must be a string or an array of strings")
	}
	if len(many) > 16 {
		return nil, badRequest("stop has %d entries (at most 16)", len(many))
	}
	var out []string
	for _, s := range many {
		if s != "" {
			out = append(out, s)
		}
	}
	return out, nil
}

// parsePrompt reads prompt as a string, an array of strings, an array of
// token ids or an array of token-id arrays. It returns either texts or
// token lists (exactly one is non-nil).
func parsePrompt(raw json.RawMessage) (texts []string, ids [][]int, err error) {
	if len(raw) == 0 || string(raw) == "null" {
		return []string{""}, nil, nil
	}
	var one string
	if json.Unmarshal(raw, &one) == nil {
		return []string{one}, nil, nil
	}
	if json.Unmarshal(raw, &texts) == nil {
		if len(texts) == 0 {
			return nil, nil, badRequest("prompt is an empty array")
		}
		return texts, nil, nil
	}
	var flat []int
	if json.Unmarshal(raw, &flat) == nil {
		if len(flat) == 0 {
			return nil, nil, badRequest("prompt is an empty array")
		}
		return nil, [][]int{flat}, nil
	}
	if json.Unmarshal(raw, &ids) == nil && len(ids) > 0 {
		return nil, ids, nil
	}
	return nil, nil, badRequest("prompt must be a string, an array of strings, or token ids")
}

// parseContent reads a message's content: a string, or an array of parts
// of which only {"type":"text","text":…} are accepted.
func parseContent(m wire.ChatMessage) (string, error) {
	s, err := m.Text()
	var ce *wire.ContentError
	switch {
	case errors.As(err, &ce) && ce.Part < 0:
		return "", badRequest("message content must be a string or an array of text parts")
	case errors.As(err, &ce):
		return "", badRequest("message content part type %q is not supported (only text)", ce.Type)
	}
	return s, err
}
