package reward

import "errors"

// ErrConfig means a Config field holds a value the reward cannot use.
var ErrConfig = errors.New("reward: invalid config")

// ErrNoLogprobs means an answer held no log-probabilities at all, so there
// is nothing to floor a missing verbalizer against.
var ErrNoLogprobs = errors.New("reward: no log-probabilities returned")

// ErrShape means the inputs to Step do not line up (a prompt with a
// different number of answers than there are labels, a label index out of
// range).
var ErrShape = errors.New("reward: mismatched shapes")
