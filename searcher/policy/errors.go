package policy

import "errors"

// Errors callers can match with errors.Is.
var (
	// ErrConfig means a Config field is out of range; the message names it.
	ErrConfig = errors.New("policy: invalid config")
	// ErrBackbone means the backbone's shapes are unusable or it returned
	// a hidden state of the wrong size.
	ErrBackbone = errors.New("policy: invalid backbone")
	// ErrBatch means Update was given prompts or rewards it cannot use.
	ErrBatch = errors.New("policy: invalid batch")
	// ErrCheckpoint means a checkpoint is corrupt, truncated, of another
	// format or version, or internally inconsistent.
	ErrCheckpoint = errors.New("policy: bad checkpoint")
	// ErrMismatch means a checkpoint is valid but was written for another
	// backbone (different head shape or weights).
	ErrMismatch = errors.New("policy: checkpoint does not match backbone")
)
