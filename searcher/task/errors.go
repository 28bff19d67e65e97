package task

import (
	"errors"
	"fmt"
)

// Sentinels a *FieldError unwraps to.
var (
	// ErrUnknownField means the file has a key the schema does not know.
	ErrUnknownField = errors.New("unknown field")
	// ErrMissing means a required field is absent or empty.
	ErrMissing = errors.New("missing")
	// ErrInvalid means a field's value is out of range or malformed.
	ErrInvalid = errors.New("invalid value")
	// ErrVerbalizer means a verbalizer is not exactly one token of the
	// model, or two labels share one.
	ErrVerbalizer = errors.New("bad verbalizer")
	// ErrDataset means a dataset file cannot be read, is empty, or holds a
	// malformed row or a label the task does not list.
	ErrDataset = errors.New("bad dataset")
)

// FieldError is a task-file error located at a field: Field is its dotted
// path ("data.train", "labels.harvest", "manual_prompts[1]") and Line its
// line in the task file (the enclosing block's line when the field is
// absent; 0 when not known).
type FieldError struct {
	Field string
	Line  int
	Err   error
}

// Error reads "task: line 7: labels.harvest: bad verbalizer: …".
func (e *FieldError) Error() string {
	if e.Line > 0 {
		return fmt.Sprintf("task: line %d: %s: %v", e.Line, e.Field, e.Err)
	}
	return fmt.Sprintf("task: %s: %v", e.Field, e.Err)
}

// Unwrap returns the cause, which wraps one of the sentinels above.
func (e *FieldError) Unwrap() error { return e.Err }
