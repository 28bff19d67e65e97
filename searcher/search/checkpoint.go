package search

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"

	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/scorer"
)

// checkpointVersion is the layout of State; a reader refuses any other.
const checkpointVersion = 3

// ErrStopped ends a search that stopped early on purpose (StopAfter); its
// last checkpoint resumes it.
var ErrStopped = errors.New("search: stopped early; resume from the checkpoint")

// ErrCheckpoint reports a checkpoint that cannot be resumed.
var ErrCheckpoint = errors.New("search: unusable checkpoint")

// State is everything a search needs to go on after Step exactly as if it
// had never stopped: the policy (its parameters, target network, optimizer
// and sampler state), the search's own random state and what it has
// recorded so far.
type State struct {
	Version    int           `json:"version"`
	Task       string        `json:"task"`
	Seed       int64         `json:"seed"`
	Step       int           `json:"step"`
	Random     []byte        `json:"random"` // the example sampler's PCG state
	History    []Point       `json:"history"`
	Calls      []scorer.Call `json:"calls"`
	DevAcc     float64       `json:"dev_accuracy"`
	GreedyText string        `json:"greedy_prompt"`
	// Sampled are the distinct prompts judged so far, in the order first
	// seen, and Judged the search's verdicts and tally.
	Sampled []string     `json:"sampled"`
	Judged  judge.Memory `json:"judged"`
	Policy  []byte       `json:"policy"` // the policy's own checkpoint
	// Answered are the calls answered after Step that a resumed search
	// takes again instead of asking (see scorer.Memo): those of a search
	// that failed part way.
	Answered []scorer.Answer `json:"answered,omitempty"`
}

// WriteState writes s as JSON.
func WriteState(w io.Writer, s *State) error {
	enc := json.NewEncoder(w)
	return enc.Encode(s)
}

// ReadState reads a checkpoint written by WriteState for task name and
// seed, refusing another version, another task or a damaged file.
func ReadState(r io.Reader, name string, seed int64) (*State, error) {
	dec := json.NewDecoder(io.LimitReader(r, 1<<30))
	dec.DisallowUnknownFields()
	var s State
	if err := dec.Decode(&s); err != nil {
		return nil, fmt.Errorf("%w: %w", ErrCheckpoint, err)
	}
	switch {
	case s.Version != checkpointVersion:
		return nil, fmt.Errorf("%w: version %d, want %d", ErrCheckpoint, s.Version, checkpointVersion)
	case s.Task != name || s.Seed != seed:
		return nil, fmt.Errorf("%w: it is of task %q seed %d, not %q seed %d", ErrCheckpoint, s.Task, s.Seed, name, seed)
	case s.Step < 0 || len(s.Policy) == 0 || len(s.Random) == 0:
		return nil, fmt.Errorf("%w: incomplete", ErrCheckpoint)
	}
	return &s, nil
}

// PolicyReader returns the policy's checkpoint for loading.
func (s *State) PolicyReader() io.Reader { return bytes.NewReader(s.Policy) }

// snapshot captures the runner after step.
func (r *runner) snapshot(step int, res *Results) (*State, error) {
	rnd, err := r.pcg.MarshalBinary()
	if err != nil {
		return nil, err
	}
	var pol bytes.Buffer
	if err := r.o.Policy.Save(&pol); err != nil {
		return nil, fmt.Errorf("search: save the policy: %w", err)
	}
	return &State{
		Version: checkpointVersion, Task: r.t.Name, Seed: r.t.Seed, Step: step, Random: rnd,
		History: append([]Point(nil), res.History...), Calls: append([]scorer.Call(nil), r.calls...),
		DevAcc: r.devAcc, GreedyText: r.greedyText, Policy: pol.Bytes(),
		Sampled: append([]string(nil), r.sampled...), Judged: r.rl.Save(),
	}, nil
}

// restore puts the runner and results back where s left them.
func (r *runner) restore(s *State, res *Results) error {
	if err := r.pcg.UnmarshalBinary(s.Random); err != nil {
		return fmt.Errorf("%w: random state: %w", ErrCheckpoint, err)
	}
	r.rng = rand.New(r.pcg)
	res.History = append([]Point(nil), s.History...)
	r.calls = append([]scorer.Call(nil), s.Calls...)
	if err := r.rl.Restore(s.Judged); err != nil {
		return fmt.Errorf("%w: %w", ErrCheckpoint, err)
	}
	for _, p := range s.Sampled {
		r.note(p)
	}
	r.devAcc, r.greedyText = s.DevAcc, s.GreedyText
	return nil
}
