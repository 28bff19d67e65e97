// Package search runs one prompt search: the soft Q-learning policy
// proposes prompts, the scorer has them judged through the proxy, the
// reward turns the judgements into the policy's training signal, and at
// the end the search chooses its prompt among its best candidates by the
// rule every contender uses (package pick, on the train and dev lines).
// Baselines (no prompt, the task's manual prompts, best-of-N and
// successive halving over random prompts, each at the search's
// judgements) run in the same search, so the results compare like with
// like.
//
// Everything a search decides comes from the task's seed and the answers
// it gets, so a search replayed from the proxy's run journal produces the
// same results.
package search

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"slices"
	"strings"

	"github.com/stintlab/stint/searcher/baseline"
	"github.com/stintlab/stint/searcher/judge"
	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

// Scorer judges filled templates; *scorer.Client is one.
type Scorer interface {
	Score(ctx context.Context, texts []string) (scorer.Result, error)
}

// Policy proposes prompts and learns from their rewards;
// *policy.Trainer is one.
type Policy interface {
	Sample(ctx context.Context, n int) ([][]int, error)
	Update(ctx context.Context, prompts [][]int, rewards []float64) (PolicyStats, error)
	Greedy(ctx context.Context) ([]int, error)
	// Save writes the policy's whole state (see Options.Checkpoint).
	Save(w io.Writer) error
}

// PolicyStats is what one policy update reports.
type PolicyStats struct {
	Loss       float64
	MeanReward float64
}

// Vocabulary turns token ids into prompt text and lists the actions.
type Vocabulary interface {
	// Text returns the prompt text of ids.
	Text(ids []int) string
	// Actions are the token ids prompts are built from.
	Actions() []int
}

// Options are a search's parts.
type Options struct {
	Task   *task.Task
	Scorer Scorer
	Policy Policy
	Vocab  Vocabulary
	// EvalEvery is how often (in steps) the greedy prompt is scored on the
	// dev set; 0 means every tenth of the steps.
	EvalEvery int
	// Progress, when set, is called after every step and as the later
	// phases go.
	Progress func(Progress)
	// Checkpoint, when set, receives the search's state every
	// CheckpointEvery steps (0: every tenth of the steps) and at StopAfter;
	// it should store it atomically.
	Checkpoint      func(*State) error
	CheckpointEvery int
	// Resume, when set, continues from a checkpoint; the Policy must have
	// been loaded from the same checkpoint (State.PolicyReader).
	Resume *State
	// StopAfter, when positive, ends the search after that step with
	// ErrStopped, once its checkpoint is written.
	StopAfter int
	// SpendCapUSD, when positive, stops the search once the proxy has
	// reported that much spent on its calls (ErrSpendCap).
	SpendCapUSD float64
	// Backbone identifies the policy's backbone model file in
	// results.json (see IdentifyBackbone).
	Backbone Backbone
	// Memo, when set, is the Scorer's memo of answered calls
	// (scorer.Options.Memo): a checkpoint then carries the answers since
	// the one before, and a search that fails part way (a budget refusal,
	// a cancel) writes a checkpoint from which its resumption makes no call
	// twice (see scorer.Memo).
	Memo *scorer.Memo
	// ZeroRewards trains the policy on zero rewards: a broken learner
	// whose proposals stay random, for proving that the search's
	// learning test can fail. Never set outside such a test.
	ZeroRewards bool
}

// ErrSpendCap stops a search whose calls reached its spend cap.
var ErrSpendCap = errors.New("search: the spend cap is reached")

// The phases a search goes through, as Progress names them.
const (
	PhaseSearch   = "search"
	PhaseChoice   = "choice"
	PhaseEvaluate = "evaluation"
)

// Progress is the state of a search after a step, or in a later phase.
type Progress struct {
	// Phase is PhaseSearch, PhaseChoice, a baseline's name or
	// PhaseEvaluate; Done of Total says how far the phase is (steps in
	// the search, judgements sent in the choice and the baselines, of the
	// judgements they may make; contenders in the evaluation).
	Phase       string
	Done, Total int
	Step, Steps int
	// ResumedAfter is the checkpoint's step this run went on from; 0 for
	// a search that started at step 1.
	ResumedAfter int
	MeanReward   float64
	TrainAcc     float64 // mean accuracy of the step's sampled prompts
	DevAcc       float64 // of the latest greedy prompt; -1 before the first evaluation
	Prompt       string  // the latest greedy prompt
	// Best is the best greedy prompt so far by dev accuracy (see BestByDev).
	Best         DevBest
	Calls        scorer.Totals
	FlooredShare float64
}

// DevBest is the greedy prompt with the highest dev accuracy of those
// evaluated so far (the earliest on ties), the step it was evaluated at and
// that accuracy; Step 0 and DevAcc −1 before the first evaluation.
type DevBest struct {
	Prompt string
	Step   int
	DevAcc float64
}

// BestByDev finds the best greedy prompt by dev accuracy in a history.
func BestByDev(h []Point) DevBest {
	b := DevBest{DevAcc: -1}
	for _, p := range h {
		b = b.note(p)
	}
	return b
}

// note keeps p's greedy prompt if it was evaluated and beats b.
func (b DevBest) note(p Point) DevBest {
	if p.DevAcc >= 0 && p.DevAcc > b.DevAcc {
		return DevBest{Prompt: p.Prompt, Step: p.Step, DevAcc: p.DevAcc}
	}
	return b
}

// Point is one line of the history.
type Point struct {
	Step       int     `json:"step"`
	MeanReward float64 `json:"mean_reward"`
	TrainAcc   float64 `json:"train_accuracy"`
	DevAcc     float64 `json:"dev_accuracy"` // -1 when not evaluated at this step
	Loss       float64 `json:"loss"`
	Prompt     string  `json:"greedy_prompt,omitempty"`
}

// The contenders' methods.
const (
	MethodRL       = "rl"        // the search's choice among its candidates
	MethodRLGreedy = "rl-greedy" // the policy's greedy prompt at the end when it is not rl's, for reference
	MethodEmpty    = "empty"
	MethodManual   = "manual"
)

// Contender is a prompt and how it did.
type Contender struct {
	// Method is one of the Method constants or a baseline's name
	// (task.Baselines).
	Method   string  `json:"method"`
	Prompt   string  `json:"prompt"`
	TrainAcc float64 `json:"train_accuracy"`
	DevAcc   float64 `json:"dev_accuracy"`
	TestAcc  float64 `json:"test_accuracy"` // -1 without a test set
	// Calls is how many prompt×example judgements the method spent
	// finding its prompt (the evaluation on train/dev/test not counted).
	Calls int `json:"search_judgements"`
	// SearchCalls are the scoring calls the method made finding its prompt
	// (rl and rl-greedy share one search, its curve's dev evaluations and
	// its choice included; none for the empty and manual prompts) and
	// SearchSpendUSD what the proxy reported for them.
	SearchCalls    int     `json:"search_calls"`
	SearchSpendUSD float64 `json:"search_spend_usd"`
	// SearchNewTexts counts the texts among its judgements the method had
	// not had judged before, and SearchAloneUSD their price before the
	// cache: what the method would pay running alone on an empty cache
	// (see judge.Tally.AloneUSD), the yardstick of equal-spend comparisons.
	SearchNewTexts int     `json:"search_new_texts"`
	SearchAloneUSD float64 `json:"search_alone_usd"`
	// SearchUpstream counts the search calls that reached the upstream
	// and SearchPriceUSD is their price before the cache: what the same
	// search sent straight to the upstream, with no proxy, would pay. Both
	// are of this process's calls (a replay makes no upstream call), so
	// results.json leaves them out; the report has them.
	SearchUpstream int     `json:"-"`
	SearchPriceUSD float64 `json:"-"`
	// EvalCalls and EvalSpendUSD are the same for scoring the prompt on
	// the train, dev and test sets.
	EvalCalls    int     `json:"eval_calls"`
	EvalSpendUSD float64 `json:"eval_spend_usd"`
}

// Spend is what the proxy reported for all of the contender's calls,
// finding and evaluating its prompt.
func (c Contender) Spend() (calls int, usd float64) {
	return c.SearchCalls + c.EvalCalls, c.SearchSpendUSD + c.EvalSpendUSD
}

// searched fills c's search figures from a tally.
func (c *Contender) searched(t judge.Tally) {
	c.Calls, c.SearchCalls, c.SearchSpendUSD = t.Judgements, t.Calls, t.RunCostUSD
	c.SearchNewTexts, c.SearchAloneUSD = t.New, t.AloneUSD
	c.SearchUpstream, c.SearchPriceUSD = t.Upstream, t.PriceUSD
}

// Results are a finished search. They hold nothing that differs between a
// run and its replay: no times, no cache figures, and the contenders' spend
// is each call's cost to the run (scorer.Call.RunCostUSD), which a replay
// reads from the recording.
type Results struct {
	Task  string `json:"task"`
	Seed  int64  `json:"seed"`
	Steps int    `json:"steps"`
	// Budget is the judgements the RL search may make, its choice
	// included, and so what each baseline is given.
	Budget int `json:"judgement_budget"`
	// Best is the RL search's choice (the contender "rl").
	Best    Contender   `json:"best"`
	Ranking []Contender `json:"contenders"`
	// Choice says how the RL search chose among its candidates.
	Choice   ChoiceReport  `json:"choice"`
	History  []Point       `json:"-"`
	Floored  int           `json:"floored_verbalizers"`
	Lookups  int           `json:"verbalizer_lookups"`
	Config   Settings      `json:"config"`
	Versions Versions      `json:"versions"`
	Spending scorer.Totals `json:"-"`
	// Extras carries what a baseline keeps for reading it again at a
	// smaller spend (best-of-N's judged candidates), for comparisons.
	Extras Extras `json:"-"`
	// Resumable says a failed search wrote a checkpoint that resumes it.
	Resumable bool `json:"-"`
	// Stopped, when set, says why the search ended before its end: the
	// results are partial, holding the contenders that had found their
	// prompts (accuracies −1 where they were not evaluated yet), and its
	// checkpoint resumes it.
	Stopped string `json:"stopped,omitempty"`
}

// Extras are details of a search that comparisons read and results.json
// leaves out.
type Extras struct {
	// BestOfN are best-of-N's candidates in the order drawn, with their
	// accuracy and spend.
	BestOfN []baseline.Candidate
	// Pool is the number of lines best-of-N judged each candidate on.
	Pool int
}

// FlooredShare is the share of verbalizer look-ups that gave the
// verbalizer the floor (0 with no look-ups).
func (r Results) FlooredShare() float64 { return share(r.Floored, r.Lookups) }

// Contender returns the first contender of method, and whether there is one.
func (r Results) Contender(method string) (Contender, bool) {
	for _, c := range r.Ranking {
		if c.Method == method {
			return c, true
		}
	}
	return Contender{}, false
}

// Settings are the task settings a result depends on.
type Settings struct {
	Model           string            `json:"model"`
	Endpoint        string            `json:"endpoint"`
	Template        string            `json:"template"`
	Labels          map[string]string `json:"labels"` // label → verbalizer
	PromptLength    int               `json:"prompt_length"`
	PromptsPerStep  int               `json:"prompts_per_step"`
	ExamplesPerStep int               `json:"examples_per_step"`
	TopLogprobs     int               `json:"top_logprobs"`
	Actions         int               `json:"action_vocabulary"`
	RewardKind      string            `json:"reward_kind"`
	RewardFactor    float64           `json:"reward_factor"`
	LearningRate    float64           `json:"learning_rate"`
	TopK            int               `json:"top_k"`
	TargetRate      float64           `json:"target_rate"`
	ChoiceShare     float64           `json:"choice_share"`
	Candidates      int               `json:"candidates"`
	HalvingFirst    int               `json:"halving_first_lines"`
}

// Versions say what produced a result.
type Versions struct {
	Format int    `json:"results_format"`
	Stint  string `json:"stint"` // the module version or VCS revision of the binary
	Go     string `json:"go"`    // the Go release that built it (runtime.Version)
	// Backbone is the policy's backbone model file; zero when not given
	// (Options.Backbone).
	Backbone Backbone `json:"backbone"`
}

// Run searches, chooses the search's prompt, runs the baselines and
// scores every contender on the train, dev and test sets.
func Run(ctx context.Context, o Options) (Results, error) {
	t := o.Task
	if t == nil || o.Scorer == nil || o.Policy == nil || o.Vocab == nil {
		return Results{}, errors.New("search: task, scorer, policy and vocabulary are required")
	}
	if len(t.Train) == 0 || len(t.Dev) == 0 {
		return Results{}, errors.New("search: the task needs train and dev examples")
	}
	r := newRunner(o)
	res := Results{Task: t.Name, Seed: t.Seed, Steps: t.Steps, Budget: r.budget.Total(),
		Config: settingsOf(t, len(o.Vocab.Actions()), o.Policy), Versions: versions(o.Backbone)}
	if o.Resume != nil && o.Memo != nil {
		o.Memo.Give(o.Resume.Answered)
	}
	if err := r.train(ctx, &res); err != nil {
		return r.fail(res, nil, 0, err)
	}
	choice, err := r.choose(ctx)
	res.Choice = choice
	rl := Contender{Method: MethodRL, Prompt: choice.Prompt}
	rl.searched(r.rl.Tally())
	if err != nil {
		var found []Contender
		if errors.Is(err, ErrSpendCap) {
			found = append(found, rl) // chosen, then the cap was reached
		}
		return r.fail(res, found, 0, err)
	}
	contenders := []Contender{rl}
	if r.greedyText != rl.Prompt {
		greedy := rl
		greedy.Method, greedy.Prompt = MethodRLGreedy, r.greedyText
		contenders = append(contenders, greedy)
	}
	contenders = append(contenders, Contender{Method: MethodEmpty})
	for _, m := range t.ManualPrompts {
		contenders = append(contenders, Contender{Method: MethodManual, Prompt: m})
	}
	for _, name := range t.Baselines.Run {
		c, err := r.baseline(ctx, name, &res)
		if err != nil {
			if c.Prompt != "" || errors.Is(err, ErrSpendCap) {
				contenders = append(contenders, c) // found, then the cap was reached
			}
			return r.fail(res, contenders, 0, err)
		}
		contenders = append(contenders, c)
	}
	for i := range contenders {
		r.progress(Progress{Phase: PhaseEvaluate, Done: i, Total: len(contenders)})
		if err := r.evaluate(ctx, &contenders[i]); err != nil {
			return r.fail(res, contenders, i, err)
		}
	}
	r.progress(Progress{Phase: PhaseEvaluate, Done: len(contenders), Total: len(contenders)})
	res.Ranking = contenders
	res.Best = contenders[0]
	all := r.tally()
	res.Floored, res.Lookups = all.Floored, all.Lookups
	res.Spending = scorer.Sum(r.calls)
	return res, nil
}

// fail ends a search that failed part way: res gets the contenders found so
// far (the first evaluated of them with their accuracies, the others' −1)
// and the reason, and, with checkpoints on, a checkpoint is written that
// resumes the search from its last one with every answer it got since (see
// Options.Memo). A stop on purpose (ErrStopped) has its checkpoint already.
func (r *runner) fail(res Results, found []Contender, evaluated int, err error) (Results, error) {
	if errors.Is(err, ErrStopped) {
		return res, err
	}
	res.Ranking = slices.Clone(found)
	for i := evaluated; i < len(res.Ranking); i++ {
		c := &res.Ranking[i]
		c.TrainAcc, c.DevAcc, c.TestAcc, c.EvalCalls, c.EvalSpendUSD = -1, -1, -1, 0, 0
	}
	if len(res.Ranking) > 0 {
		res.Best = res.Ranking[0]
	}
	all := r.tally()
	res.Floored, res.Lookups = all.Floored, all.Lookups
	res.Spending = scorer.Sum(r.calls)
	res.Stopped = err.Error()
	if r.o.Checkpoint != nil && r.last != nil {
		st := *r.last
		if r.o.Memo != nil {
			st.Answered = r.o.Memo.Answers()
		}
		if cerr := r.o.Checkpoint(&st); cerr != nil {
			return res, fmt.Errorf("%w (and its checkpoint could not be written: %w)", err, cerr)
		}
		res.Resumable = true
	}
	return res, err
}

// runner is one search's state beyond the policy.
type runner struct {
	o      Options
	t      *task.Task
	budget Budget
	pcg    *rand.PCG // rng's source, kept for checkpoints
	rng    *rand.Rand
	// calls are every scoring call of the search, in order.
	calls []scorer.Call
	// rl judges the search's prompts, eval the contenders' final
	// evaluation; done holds the tallies of finished baselines' panels.
	rl, eval *judge.Panel
	done     judge.Tally
	// sampled lists the distinct prompts the policy sampled or chose
	// greedily, in the order first seen: the candidates of the choice.
	sampled    []string
	seen       map[string]bool
	devAcc     float64
	greedyText string
	// last is the latest checkpoint (or the start), the point a failed
	// search resumes from; phase counts the texts sent in the current
	// phase for its progress.
	last  *State
	phase *phaseCount
}

// phaseCount reports a phase's progress as its texts are sent.
type phaseCount struct {
	name        string
	done, total int
}

func newRunner(o Options) *runner {
	r := &runner{o: o, t: o.Task, budget: BudgetFor(o.Task, o.EvalEvery), pcg: rand.NewPCG(uint64(o.Task.Seed), 0x5eed), seen: map[string]bool{}, devAcc: -1}
	r.rng = rand.New(r.pcg)
	sc := recordingScorer{sc: o.Scorer, calls: &r.calls, sent: r.sent}
	r.rl = judge.New(o.Task, sc)
	r.eval = judge.New(o.Task, sc)
	return r
}

// recordingScorer notes every call its scorer makes, and tells sent how
// many texts each Score judged.
type recordingScorer struct {
	sc    Scorer
	calls *[]scorer.Call
	sent  func(n int)
}

func (s recordingScorer) Score(ctx context.Context, texts []string) (scorer.Result, error) {
	res, err := s.sc.Score(ctx, texts)
	if err == nil {
		*s.calls = append(*s.calls, res.Calls...)
		if s.sent != nil {
			s.sent(len(texts))
		}
	}
	return res, err
}

// sent counts texts judged in a phase counted by judgements and reports
// the phase's progress.
func (r *runner) sent(n int) {
	if ph := r.phase; ph != nil {
		ph.done += n
		r.progress(Progress{Phase: ph.name, Done: min(ph.done, ph.total), Total: ph.total})
	}
}

// counting starts a phase whose progress is its judgements, of total.
func (r *runner) counting(name string, total int) {
	r.phase = &phaseCount{name: name, total: total}
	r.progress(Progress{Phase: name, Done: 0, Total: total})
}

// tally sums every panel's tally.
func (r *runner) tally() judge.Tally { return r.rl.Tally().Add(r.eval.Tally()).Add(r.done) }

func (r *runner) progress(p Progress) {
	if r.o.Progress == nil {
		return
	}
	p.Calls = scorer.Sum(r.calls)
	all := r.tally()
	p.FlooredShare = share(all.Floored, all.Lookups)
	r.o.Progress(p)
}

// note adds a prompt to the candidates if it is new.
func (r *runner) note(prompt string) {
	if !r.seen[prompt] {
		r.seen[prompt] = true
		r.sampled = append(r.sampled, prompt)
	}
}

// train runs the search's steps, from a checkpoint when Options.Resume.
func (r *runner) train(ctx context.Context, res *Results) error {
	t, o := r.t, r.o
	first := 1
	if s := o.Resume; s != nil {
		if err := r.restore(s, res); err != nil {
			return err
		}
		first = s.Step + 1
		resumed := *s
		resumed.Answered = nil // given to the memo; a later checkpoint has what is left
		r.last = &resumed
	} else if o.Checkpoint != nil {
		st, err := r.snapshot(0, res)
		if err != nil {
			return err
		}
		r.last = st
	}
	best := BestByDev(res.History)
	every := o.CheckpointEvery
	if every <= 0 {
		every = max(1, t.Steps/10)
	}
	cfg := t.Reward
	if t.PromptsPerStep < 2 {
		cfg.NoZScore = true // one prompt has nothing to be compared with
	}
	for step := first; step <= t.Steps; step++ {
		prompts, err := o.Policy.Sample(ctx, t.PromptsPerStep)
		if err != nil {
			return fmt.Errorf("search: step %d: sample: %w", step, err)
		}
		texts := make([]string, len(prompts))
		for i, p := range prompts {
			texts[i] = o.Vocab.Text(p)
			r.note(texts[i])
		}
		vs, err := r.rl.Judge(ctx, texts, r.trainBatch())
		if err != nil {
			return fmt.Errorf("search: step %d: %w", step, err)
		}
		raw := rawOf(vs)
		rewards := perPrompt(cfg.Normalize(raw))
		if o.ZeroRewards {
			clear(rewards)
		}
		ps, err := o.Policy.Update(ctx, prompts, rewards)
		if err != nil {
			return fmt.Errorf("search: step %d: update: %w", step, err)
		}
		pt := Point{Step: step, MeanReward: meanOf(raw), TrainAcc: meanAccuracy(vs), DevAcc: -1, Loss: ps.Loss}
		if step%r.budget.EvalEvery == 0 || step == t.Steps {
			g, err := o.Policy.Greedy(ctx)
			if err != nil {
				return fmt.Errorf("search: step %d: greedy: %w", step, err)
			}
			r.greedyText = o.Vocab.Text(g)
			r.note(r.greedyText)
			dv, err := r.rl.Complete(ctx, []string{r.greedyText}, t.Dev)
			if err != nil {
				return fmt.Errorf("search: step %d: dev: %w", step, err)
			}
			r.devAcc = judge.Accuracy(dv[0])
			pt.DevAcc, pt.Prompt = r.devAcc, r.greedyText
		}
		res.History = append(res.History, pt)
		best = best.note(pt)
		stop := o.StopAfter > 0 && step == o.StopAfter && step < t.Steps
		if o.Checkpoint != nil && (step%every == 0 || stop) {
			st, err := r.snapshot(step, res)
			if err != nil {
				return err
			}
			if o.Memo != nil {
				o.Memo.Mark()
				st.Answered = o.Memo.Answers()
			}
			if err := o.Checkpoint(st); err != nil {
				return fmt.Errorf("search: checkpoint after step %d: %w", step, err)
			}
			r.last = st
		}
		if stop {
			return fmt.Errorf("%w (after step %d)", ErrStopped, step)
		}
		if err := r.checkCap(fmt.Sprintf("after step %d", step)); err != nil {
			return err
		}
		r.progress(Progress{Phase: PhaseSearch, Done: step, Total: t.Steps, Step: step, Steps: t.Steps, ResumedAfter: first - 1,
			MeanReward: pt.MeanReward, TrainAcc: pt.TrainAcc, DevAcc: r.devAcc, Prompt: r.greedyText, Best: best})
	}
	return nil
}

// checkCap stops the search once the proxy has reported its spend cap
// spent.
func (r *runner) checkCap(when string) error {
	if spent := scorer.Sum(r.calls).CostUSD; r.o.SpendCapUSD > 0 && spent >= r.o.SpendCapUSD {
		return fmt.Errorf("%w: %.6f USD of %.6f %s (as the proxy reported)", ErrSpendCap, spent, r.o.SpendCapUSD, when)
	}
	return nil
}

// evaluate scores c's prompt on the train, dev and test sets.
func (r *runner) evaluate(ctx context.Context, c *Contender) error {
	before := r.eval.Tally()
	sets := [][]task.Example{r.t.Train, r.t.Dev, r.t.Test}
	accs := []*float64{&c.TrainAcc, &c.DevAcc, &c.TestAcc}
	for i, set := range sets {
		if len(set) == 0 {
			*accs[i] = -1
			continue
		}
		vs, err := r.eval.Complete(ctx, []string{c.Prompt}, set)
		if err != nil {
			return fmt.Errorf("search: evaluating %s: %w", c.Method, err)
		}
		*accs[i] = judge.Accuracy(vs[0])
	}
	ev := r.eval.Tally().Sub(before)
	c.EvalCalls, c.EvalSpendUSD = ev.Calls, ev.RunCostUSD
	return nil
}

// trainBatch draws the step's training examples, without repeats when the
// set is large enough.
func (r *runner) trainBatch() []task.Example {
	n := examplesPerStep(r.t)
	idx := r.rng.Perm(len(r.t.Train))[:n]
	slices.Sort(idx) // a stable order for the batched calls
	out := make([]task.Example, n)
	for i, j := range idx {
		out[i] = r.t.Train[j]
	}
	return out
}

func rawOf(vs [][]judge.Verdict) [][]float64 {
	out := make([][]float64, len(vs))
	for i, row := range vs {
		out[i] = make([]float64, len(row))
		for j, v := range row {
			out[i][j] = v.Raw
		}
	}
	return out
}

func perPrompt(rows [][]float64) []float64 {
	out := make([]float64, len(rows))
	for i, row := range rows {
		out[i] = mean(row)
	}
	return out
}

func meanAccuracy(vs [][]judge.Verdict) float64 {
	var s float64
	for _, row := range vs {
		s += judge.Accuracy(row)
	}
	return s / float64(max(len(vs), 1))
}

func mean(xs []float64) float64 {
	if len(xs) == 0 {
		return 0
	}
	var s float64
	for _, x := range xs {
		s += x
	}
	return s / float64(len(xs))
}

func meanOf(rows [][]float64) float64 {
	var all []float64
	for _, r := range rows {
		all = append(all, r...)
	}
	return mean(all)
}

func share(a, b int) float64 {
	if b == 0 {
		return 0
	}
	return float64(a) / float64(b)
}

// PromptText joins token texts into a prompt, without the leading space a
// word-initial first token brings (the template supplies the spacing).
func PromptText(pieces []string) string {
	return strings.TrimPrefix(strings.Join(pieces, ""), " ")
}
