// Package search runs one prompt search: the soft Q-learning policy
// proposes prompts, the scorer has them judged through the proxy, the
// reward turns the judgements into the policy's training signal. Baselines
// (no prompt, the task's manual prompts, random search at the same number
// of scoring calls) are scored in the same run, so the results compare
// like with like.
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

	"github.com/stintlab/stint/searcher/reward"
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
	// Progress, when set, is called after every step.
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
}

// ErrSpendCap stops a search whose calls reached its spend cap.
var ErrSpendCap = errors.New("search: the spend cap is reached")

// Progress is the state of a search after a step.
type Progress struct {
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

// Contender is a prompt and how it did.
type Contender struct {
	Method   string  `json:"method"` // "rl", "rl-best", "empty", "manual", "random"
	Prompt   string  `json:"prompt"`
	TrainAcc float64 `json:"train_accuracy"`
	DevAcc   float64 `json:"dev_accuracy"`
	TestAcc  float64 `json:"test_accuracy"` // -1 without a test set
	// Calls is how many prompt×example judgements the method spent
	// finding its prompt (the evaluation on train/dev/test not counted).
	Calls int `json:"search_judgements"`
	// SearchCalls are the scoring calls the method made finding its prompt
	// (rl and rl-best share one search, the dev evaluations along its
	// curve included; none for the empty and manual prompts) and
	// SearchSpendUSD what the proxy reported for them.
	SearchCalls    int     `json:"search_calls"`
	SearchSpendUSD float64 `json:"search_spend_usd"`
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

// Results are a finished search. They hold nothing that differs between a
// run and its replay: no times, no cache figures, and the contenders' spend
// is each call's cost to the run (scorer.Call.RunCostUSD), which a replay
// reads from the recording.
type Results struct {
	Task     string        `json:"task"`
	Seed     int64         `json:"seed"`
	Steps    int           `json:"steps"`
	Best     Contender     `json:"best"`
	Ranking  []Contender   `json:"contenders"`
	History  []Point       `json:"-"`
	Floored  int           `json:"floored_verbalizers"`
	Lookups  int           `json:"verbalizer_lookups"`
	Config   Settings      `json:"config"`
	Versions Versions      `json:"versions"`
	Spending scorer.Totals `json:"-"`
}

// FlooredShare is the share of verbalizer look-ups that gave the
// verbalizer the floor (0 with no look-ups).
func (r Results) FlooredShare() float64 { return share(r.Floored, r.Lookups) }

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
	RewardFactor    float64           `json:"reward_factor"`
	LearningRate    float64           `json:"learning_rate"`
	TopK            int               `json:"top_k"`
	TargetRate      float64           `json:"target_rate"`
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

// Run searches, then scores the baselines and every contender on the dev
// and test sets.
func Run(ctx context.Context, o Options) (Results, error) {
	t := o.Task
	if t == nil || o.Scorer == nil || o.Policy == nil || o.Vocab == nil {
		return Results{}, errors.New("search: task, scorer, policy and vocabulary are required")
	}
	if len(t.Train) == 0 || len(t.Dev) == 0 {
		return Results{}, errors.New("search: the task needs train and dev examples")
	}
	evalEvery := o.EvalEvery
	if evalEvery <= 0 {
		evalEvery = max(1, t.Steps/10)
	}
	r := &runner{o: o, t: t, pcg: rand.NewPCG(uint64(t.Seed), 0x5eed)}
	r.rng = rand.New(r.pcg)
	res := Results{Task: t.Name, Seed: t.Seed, Steps: t.Steps, Config: settingsOf(t, len(o.Vocab.Actions()), o.Policy), Versions: versions(o.Backbone)}
	devAcc, greedyText := -1.0, ""
	first := 1
	if s := o.Resume; s != nil {
		if err := r.restore(s, &res); err != nil {
			return res, err
		}
		devAcc, greedyText, first = s.DevAcc, s.GreedyText, s.Step+1
	}
	best := BestByDev(res.History)
	every := o.CheckpointEvery
	if every <= 0 {
		every = max(1, t.Steps/10)
	}
	for step := first; step <= t.Steps; step++ {
		prompts, err := o.Policy.Sample(ctx, t.PromptsPerStep)
		if err != nil {
			return res, fmt.Errorf("search: step %d: sample: %w", step, err)
		}
		texts := make([]string, len(prompts))
		for i, p := range prompts {
			texts[i] = o.Vocab.Text(p)
		}
		batch := r.trainBatch()
		st, err := r.judge(ctx, texts, batch)
		if err != nil {
			return res, fmt.Errorf("search: step %d: %w", step, err)
		}
		r.noteBest(texts, st.Raw)
		ps, err := o.Policy.Update(ctx, prompts, st.PerPrompt)
		if err != nil {
			return res, fmt.Errorf("search: step %d: update: %w", step, err)
		}
		pt := Point{Step: step, MeanReward: meanOf(st.Raw), TrainAcc: mean(st.Accuracy), DevAcc: -1, Loss: ps.Loss}
		if step%evalEvery == 0 || step == t.Steps {
			g, err := o.Policy.Greedy(ctx)
			if err != nil {
				return res, fmt.Errorf("search: step %d: greedy: %w", step, err)
			}
			greedyText = o.Vocab.Text(g)
			if devAcc, err = r.accuracy(ctx, greedyText, t.Dev); err != nil {
				return res, fmt.Errorf("search: step %d: dev: %w", step, err)
			}
			pt.DevAcc, pt.Prompt = devAcc, greedyText
		}
		res.History = append(res.History, pt)
		best = best.note(pt)
		stop := o.StopAfter > 0 && step == o.StopAfter && step < t.Steps
		if o.Checkpoint != nil && (step%every == 0 || stop) {
			st, err := r.snapshot(step, &res, devAcc, greedyText)
			if err != nil {
				return res, err
			}
			if err := o.Checkpoint(st); err != nil {
				return res, fmt.Errorf("search: checkpoint after step %d: %w", step, err)
			}
		}
		if stop {
			return res, fmt.Errorf("%w (after step %d)", ErrStopped, step)
		}
		if spent := scorer.Sum(r.calls).CostUSD; o.SpendCapUSD > 0 && spent >= o.SpendCapUSD {
			return res, fmt.Errorf("%w: %.6f USD of %.6f after step %d (as the proxy reported)", ErrSpendCap, spent, o.SpendCapUSD, step)
		}
		if o.Progress != nil {
			o.Progress(Progress{Step: step, Steps: t.Steps, ResumedAfter: first - 1, MeanReward: pt.MeanReward, TrainAcc: pt.TrainAcc, DevAcc: devAcc,
				Prompt: greedyText, Best: best, Calls: scorer.Sum(r.calls), FlooredShare: share(r.floored, r.lookups)})
		}
	}
	searchCalls := searchJudgements(t)
	rlSpend := scorer.Sum(r.calls)
	rl := Contender{Method: "rl", Prompt: greedyText, Calls: searchCalls, SearchCalls: rlSpend.Calls, SearchSpendUSD: rlSpend.RunCostUSD}
	contenders := []Contender{rl}
	if r.bestText != greedyText {
		best := rl
		best.Method, best.Prompt = "rl-best", r.bestText
		contenders = append(contenders, best)
	}
	contenders = append(contenders, Contender{Method: "empty", Prompt: ""})
	for _, m := range t.ManualPrompts {
		contenders = append(contenders, Contender{Method: "manual", Prompt: m})
	}
	mark := len(r.calls)
	random, err := r.randomSearch(ctx, searchCalls)
	if err != nil {
		return res, err
	}
	randomSpend := scorer.Sum(r.calls[mark:])
	random.SearchCalls, random.SearchSpendUSD = randomSpend.Calls, randomSpend.RunCostUSD
	contenders = append(contenders, random)
	for i := range contenders {
		c := &contenders[i]
		mark := len(r.calls)
		if err := r.evaluate(ctx, c); err != nil {
			return res, err
		}
		ev := scorer.Sum(r.calls[mark:])
		c.EvalCalls, c.EvalSpendUSD = ev.Calls, ev.RunCostUSD
	}
	res.Ranking = contenders
	res.Best = contenders[0]
	res.Floored, res.Lookups = r.floored, r.lookups
	res.Spending = scorer.Sum(r.calls)
	return res, nil
}

// evaluate scores c's prompt on the train, dev and test sets.
func (r *runner) evaluate(ctx context.Context, c *Contender) error {
	var err error
	if c.TrainAcc, err = r.accuracy(ctx, c.Prompt, r.t.Train); err != nil {
		return err
	}
	if c.DevAcc, err = r.accuracy(ctx, c.Prompt, r.t.Dev); err != nil {
		return err
	}
	c.TestAcc = -1
	if len(r.t.Test) > 0 {
		if c.TestAcc, err = r.accuracy(ctx, c.Prompt, r.t.Test); err != nil {
			return err
		}
	}
	return nil
}

// runner is one search's state beyond the policy.
type runner struct {
	o       Options
	t       *task.Task
	pcg     *rand.PCG // rng's source, kept for checkpoints
	rng     *rand.Rand
	calls   []scorer.Call
	floored int
	lookups int
	// bestText is the sampled prompt with the highest mean raw reward on
	// its step's batch so far (the first one on ties), bestScore that mean.
	bestText  string
	bestScore float64
	seenBest  bool
}

// noteBest keeps the step's best sampled prompt if it beats the best so far.
func (r *runner) noteBest(texts []string, raw [][]float64) {
	for i, row := range raw {
		if s := mean(row); !r.seenBest || s > r.bestScore {
			r.bestText, r.bestScore, r.seenBest = texts[i], s, true
		}
	}
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

// judge scores every prompt on every example and computes the rewards.
func (r *runner) judge(ctx context.Context, prompts []string, examples []task.Example) (reward.Step, error) {
	texts := make([]string, 0, len(prompts)*len(examples))
	for _, p := range prompts {
		for _, e := range examples {
			texts = append(texts, r.t.Fill(e.Text, p))
		}
	}
	got, err := r.o.Scorer.Score(ctx, texts)
	if err != nil {
		return reward.Step{}, err
	}
	r.calls = append(r.calls, got.Calls...)
	top := make([][]map[string]float64, len(prompts))
	for p := range prompts {
		top[p] = got.Top[p*len(examples) : (p+1)*len(examples)]
	}
	truth := make([]int, len(examples))
	for i, e := range examples {
		truth[i] = r.t.LabelIndex(e.Label)
	}
	cfg := r.t.Reward
	if len(prompts) < 2 {
		cfg.NoZScore = true // one prompt has nothing to be compared with
	}
	st, err := cfg.Score(top, truth, r.t.Verbalizers())
	if err != nil {
		return reward.Step{}, err
	}
	r.floored += st.Floored
	r.lookups += st.Lookups
	return st, nil
}

// accuracy is the share of examples prompt classifies correctly.
func (r *runner) accuracy(ctx context.Context, prompt string, examples []task.Example) (float64, error) {
	st, err := r.judge(ctx, []string{prompt}, examples)
	if err != nil {
		return 0, err
	}
	return st.Accuracy[0], nil
}

// randomSearch draws uniformly random prompts of the task's length from
// the same actions and keeps the one with the best raw reward on one train
// batch, spending the same number of judgements as the search.
func (r *runner) randomSearch(ctx context.Context, budget int) (Contender, error) {
	actions := r.o.Vocab.Actions()
	perPrompt := examplesPerStep(r.t)
	best := Contender{Method: "random"}
	bestScore := 0.0
	spent := 0
	// Every random prompt is judged on the same batch, so their rewards
	// compare like with like and the best one is picked on one yardstick.
	batch := r.trainBatch()
	for spent+perPrompt <= budget {
		n := min(r.t.PromptsPerStep, (budget-spent)/perPrompt)
		texts := make([]string, n)
		for i := range texts {
			ids := make([]int, r.t.PromptLength)
			for j := range ids {
				ids[j] = actions[r.rng.IntN(len(actions))]
			}
			texts[i] = r.o.Vocab.Text(ids)
		}
		st, err := r.judge(ctx, texts, batch)
		if err != nil {
			return best, fmt.Errorf("search: random baseline: %w", err)
		}
		for i, row := range st.Raw {
			if s := mean(row); spent == 0 && i == 0 || s > bestScore {
				best.Prompt, bestScore = texts[i], s
			}
		}
		spent += n * perPrompt
	}
	best.Calls = spent
	return best, nil
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
