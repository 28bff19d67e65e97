// Package jobs is the search sidecar's job manager: searches submitted
// over HTTP run one at a time in the background, their state persists in a
// data directory, and a search the process was stopped in the middle of
// resumes from its last checkpoint when the manager opens again.
package jobs

import (
	"context"
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"time"

	"github.com/stintlab/stint/proxy/localmodel"
	"github.com/stintlab/stint/searcher/policy"
	"github.com/stintlab/stint/searcher/search"
)

// States a job moves through.
const (
	Queued   = "queued"
	Running  = "running"
	Done     = "done"
	Failed   = "failed"
	Canceled = "canceled"
)

// Spec is what a client submits.
type Spec struct {
	// Task is the path of a task file on the sidecar's machine.
	Task string `json:"task"`
	// Run is the run id the calls are recorded under; "" means one made
	// from the job id.
	Run string `json:"run,omitempty"`
	// OverCap starts the job even when its forecast is over the task's
	// spend cap.
	OverCap bool `json:"over_cap,omitempty"`
}

// Status is a job as the API shows it.
type Status struct {
	ID    string `json:"id"`
	Spec  Spec   `json:"spec"`
	State string `json:"state"`
	// Phase is what a running job is doing: the search's steps, its
	// choice, a baseline, or the evaluation (search.Progress.Phase).
	Phase string `json:"phase,omitempty"`
	Step  int    `json:"step"`
	Steps int    `json:"steps"`
	// BestPrompt is the best prompt so far: of the policy's greedy prompts
	// scored on the dev set so far (every tenth of the steps and at the
	// last), the one with the highest dev accuracy, the earliest on ties.
	// DevAcc is that accuracy (-1 before the first evaluation) and BestStep
	// the step it was scored at.
	BestPrompt string  `json:"best_prompt"`
	DevAcc     float64 `json:"dev_accuracy"`
	BestStep   int     `json:"best_step,omitempty"`
	// LatestPrompt is the greedy prompt at the latest evaluation and
	// LatestDevAcc its dev accuracy (-1 before the first); at the end it
	// is results.json's "rl-greedy" prompt.
	LatestPrompt string  `json:"latest_prompt"`
	LatestDevAcc float64 `json:"latest_dev_accuracy"`
	// TrainAcc is the latest step's mean accuracy of its sampled prompts.
	TrainAcc   float64 `json:"train_accuracy"`
	Calls      int     `json:"scoring_calls"`
	CacheShare float64 `json:"cache_share"`
	SpentUSD   float64 `json:"spent_usd"` // as the proxy reported it: an estimate
	// FlooredShare is the share of verbalizer look-ups so far that found
	// the verbalizer missing from the returned log-probabilities and gave
	// it the floor.
	FlooredShare float64 `json:"floored_share"`
	// Resumed is the step of the checkpoint the job last resumed from.
	Resumed int `json:"resumed_after_step,omitempty"`
	// Sidecar names the sidecar that runs the job, or ran it last, when
	// sidecars share one queue (redisjobs); "" on a single sidecar.
	Sidecar string `json:"sidecar,omitempty"`
	// Attempts counts the times a sidecar took the job from the shared
	// queue: 1 for a job that ran in one go, more for one resumed by
	// another sidecar; 0 on a single sidecar.
	Attempts int       `json:"attempts,omitempty"`
	Error    string    `json:"error,omitempty"`
	Created  time.Time `json:"created"`
	Updated  time.Time `json:"updated"`
}

// Options configure a Manager.
type Options struct {
	// Proxy is the proxy's base URL and Key the team key sent with every
	// call.
	Proxy, Key string
	// CheckpointEvery is passed to each search (0: its default).
	CheckpointEvery int
	// Price overrides each task's prices for its forecast (see
	// search.Job.Price).
	Price search.PriceOverride
	// Backbone identifies the model file in every job's results.json
	// (search.IdentifyBackbone, once for the process).
	Backbone search.Backbone
	// Now is the clock; nil means time.Now.
	Now func() time.Time
}

// Manager runs and keeps jobs. It is safe for concurrent use.
type Manager struct {
	dir   string
	model *localmodel.Model
	opts  Options

	mu     sync.Mutex // guards jobs, queue, cancel
	jobs   map[string]*Status
	queue  []string
	cancel map[string]context.CancelFunc
	wake   chan struct{}

	stop context.CancelFunc
	done chan struct{}
}

// ErrNotFound reports an unknown job id.
var ErrNotFound = errors.New("jobs: no such job")

// Open loads the jobs kept in dir and starts the worker. Jobs that were
// queued or running when the last manager stopped are queued again; a
// running one resumes from its checkpoint.
func Open(dir string, model *localmodel.Model, opts Options) (*Manager, error) {
	if opts.Now == nil {
		opts.Now = time.Now
	}
	if err := os.MkdirAll(filepath.Join(dir, "jobs"), 0o700); err != nil {
		return nil, fmt.Errorf("jobs: %w", err)
	}
	m := &Manager{dir: dir, model: model, opts: opts, jobs: map[string]*Status{}, cancel: map[string]context.CancelFunc{},
		wake: make(chan struct{}, 1), done: make(chan struct{})}
	entries, err := os.ReadDir(filepath.Join(dir, "jobs"))
	if err != nil {
		return nil, fmt.Errorf("jobs: %w", err)
	}
	var pending []*Status
	for _, e := range entries {
		st, err := m.load(e.Name())
		if err != nil {
			return nil, err
		}
		m.jobs[st.ID] = st
		if st.State == Queued || st.State == Running {
			pending = append(pending, st)
		}
	}
	sort.Slice(pending, func(i, j int) bool { return pending[i].Created.Before(pending[j].Created) })
	for _, st := range pending {
		m.queue = append(m.queue, st.ID)
	}
	ctx, stop := context.WithCancel(context.Background())
	m.stop = stop
	go m.work(ctx)
	m.poke()
	return m, nil
}

// Close stops the worker: a running job is interrupted and stays running
// on disk, to resume when a manager opens the directory again.
func (m *Manager) Close() {
	m.stop()
	<-m.done
}

// Submit queues a job.
func (m *Manager) Submit(spec Spec) (Status, error) {
	if spec.Task == "" {
		return Status{}, errors.New("jobs: the spec needs a task file path")
	}
	if _, err := os.Stat(spec.Task); err != nil {
		return Status{}, fmt.Errorf("jobs: task file: %w", err)
	}
	var b [6]byte
	if _, err := rand.Read(b[:]); err != nil {
		return Status{}, err
	}
	now := m.opts.Now().UTC()
	st := &Status{ID: "job-" + hex.EncodeToString(b[:]), Spec: spec, State: Queued, DevAcc: -1, LatestDevAcc: -1, Created: now, Updated: now}
	if st.Spec.Run == "" {
		st.Spec.Run = st.ID
	}
	if err := m.save(st); err != nil {
		return Status{}, err
	}
	m.mu.Lock()
	m.jobs[st.ID] = st
	m.queue = append(m.queue, st.ID)
	out := *st
	m.mu.Unlock()
	m.poke()
	return out, nil
}

// List returns every job, newest first.
func (m *Manager) List() []Status {
	m.mu.Lock()
	defer m.mu.Unlock()
	out := make([]Status, 0, len(m.jobs))
	for _, st := range m.jobs {
		out = append(out, *st)
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Created.After(out[j].Created) })
	return out
}

// Get returns one job.
func (m *Manager) Get(id string) (Status, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	st, ok := m.jobs[id]
	if !ok {
		return Status{}, fmt.Errorf("%w: %q", ErrNotFound, id)
	}
	return *st, nil
}

// Cancel stops a queued or running job for good.
func (m *Manager) Cancel(id string) (Status, error) {
	m.mu.Lock()
	st, ok := m.jobs[id]
	if !ok {
		m.mu.Unlock()
		return Status{}, fmt.Errorf("%w: %q", ErrNotFound, id)
	}
	if st.State == Queued || st.State == Running {
		st.State, st.Updated = Canceled, m.opts.Now().UTC()
		if c := m.cancel[id]; c != nil {
			c()
		}
	}
	out := *st
	m.mu.Unlock()
	return out, m.save(&out)
}

// Out is the output directory of job id.
func (m *Manager) Out(id string) string { return filepath.Join(m.dir, "jobs", id, "out") }

func (m *Manager) poke() {
	select {
	case m.wake <- struct{}{}:
	default:
	}
}

// work runs queued jobs one at a time until ctx ends.
func (m *Manager) work(ctx context.Context) {
	defer close(m.done)
	for {
		m.mu.Lock()
		var id string
		for len(m.queue) > 0 && id == "" {
			id, m.queue = m.queue[0], m.queue[1:]
			if m.jobs[id].State == Canceled {
				id = ""
			}
		}
		m.mu.Unlock()
		if id == "" {
			select {
			case <-ctx.Done():
				return
			case <-m.wake:
				continue
			}
		}
		m.run(ctx, id)
		if ctx.Err() != nil {
			return
		}
	}
}

// run runs one job to its end, or until the manager closes.
func (m *Manager) run(ctx context.Context, id string) {
	jctx, cancel := context.WithCancel(ctx)
	defer cancel()
	m.mu.Lock()
	st := m.jobs[id]
	_, statErr := os.Stat(filepath.Join(m.Out(id), search.CheckpointFile))
	resume := st.State == Running && statErr == nil
	st.State, st.Updated = Running, m.opts.Now().UTC()
	m.cancel[id] = cancel
	snap := *st
	m.mu.Unlock()
	_ = m.save(&snap)

	job := search.Job{TaskPath: st.Spec.Task, Proxy: m.opts.Proxy, Key: m.opts.Key, Run: st.Spec.Run, Out: m.Out(id),
		Resume: resume, OverCap: st.Spec.OverCap, CheckpointEvery: m.opts.CheckpointEvery, Price: m.opts.Price, Backbone: m.opts.Backbone}
	// A resumed job replaying the calls made before the checkpoint would
	// be as exact, but they are in the cache too; the run goes on
	// recording.
	oc, err := search.RunJob(jctx, m.model, job, io.Discard, func(p search.Progress) {
		m.update(id, func(s *Status) { s.Track(p) })
		if p.Phase == search.PhaseSearch && p.Step%10 == 0 {
			m.persist(id)
		}
	})
	m.mu.Lock()
	delete(m.cancel, id)
	switch {
	case st.State == Canceled:
	case ctx.Err() != nil:
		// The manager is closing: leave it running, to resume.
	case err != nil:
		st.State, st.Error = Failed, err.Error()
	default:
		// The whole search's figures, the final evaluation included.
		st.State, st.Phase = Done, ""
		res := oc.Results
		st.Calls, st.CacheShare, st.SpentUSD = res.Spending.Calls, res.Spending.CacheShare(), res.Spending.CostUSD
		st.FlooredShare = res.FlooredShare()
	}
	st.Updated = m.opts.Now().UTC()
	m.mu.Unlock()
	m.persist(id)
}

func (m *Manager) update(id string, fn func(*Status)) {
	m.mu.Lock()
	defer m.mu.Unlock()
	fn(m.jobs[id])
	m.jobs[id].Updated = m.opts.Now().UTC()
}

func (m *Manager) persist(id string) {
	m.mu.Lock()
	snap := *m.jobs[id]
	m.mu.Unlock()
	_ = m.save(&snap)
}

func (m *Manager) save(st *Status) error {
	dir := filepath.Join(m.dir, "jobs", st.ID)
	if err := os.MkdirAll(dir, 0o700); err != nil {
		return fmt.Errorf("jobs: %w", err)
	}
	return policy.WriteFileAtomic(filepath.Join(dir, "job.json"), func(w io.Writer) error {
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		return enc.Encode(st)
	})
}

func (m *Manager) load(id string) (*Status, error) {
	raw, err := os.ReadFile(filepath.Join(m.dir, "jobs", id, "job.json"))
	if err != nil {
		return nil, fmt.Errorf("jobs: %w", err)
	}
	var st Status
	if err := json.Unmarshal(raw, &st); err != nil {
		return nil, fmt.Errorf("jobs: %s: %w", id, err)
	}
	return &st, nil
}

// Track copies a running search's progress into its status: phase, calls,
// cache share and spend always; step, accuracies and prompts in the
// search's own phase.
func (s *Status) Track(p search.Progress) {
	s.Phase = p.Phase
	s.Calls, s.CacheShare, s.SpentUSD, s.FlooredShare = p.Calls.Calls, p.Calls.CacheShare(), p.Calls.CostUSD, p.FlooredShare
	if p.Phase != search.PhaseSearch {
		return
	}
	s.Step, s.Steps, s.TrainAcc = p.Step, p.Steps, p.TrainAcc
	s.BestPrompt, s.DevAcc, s.BestStep = p.Best.Prompt, p.Best.DevAcc, p.Best.Step
	s.LatestPrompt, s.LatestDevAcc = p.Prompt, p.DevAcc
	if p.ResumedAfter > 0 {
		s.Resumed = p.ResumedAfter
	}
}
