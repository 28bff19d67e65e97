package task

import (
	"math"
	"strings"
	"unicode"
	"unicode/utf8"

	"github.com/stintlab/stint/searcher/reward"
)

// Endpoint names the wire-format endpoint that scores prompts.
type Endpoint string

// The endpoints a task may score through.
const (
	// Completions is POST {base}/completions: filled templates are sent as a
	// prompt array, scored in batches.
	Completions Endpoint = "completions"
	// Chat is POST {base}/chat/completions: one user message per example.
	Chat Endpoint = "chat"
)

// Placeholders in Task.Template.
const (
	InputPlaceholder  = "{input}"
	PromptPlaceholder = "{prompt}"
)

// Defaults for fields a task file leaves out.
const (
	DefaultPromptLength    = 5
	DefaultSteps           = 200
	DefaultPromptsPerStep  = 16
	DefaultExamplesPerStep = 16
	DefaultConcurrency     = 4
	// DefaultTopLogprobs is the largest depth hosted chat APIs commonly
	// allow (about 20); the local model allows up to its vocabulary size.
	DefaultTopLogprobs = 20
	// DefaultLearningRate is the policy's Adam step size when the task
	// sets none: a value that learned on the demo task, not a tuned one
	// (the policy package's own default, for any caller, is 1e-3).
	DefaultLearningRate = 0.003
	// DefaultRewardKind is the reward a task file gets when it sets no
	// reward.kind (see reward.KindMargin for why not the paper's).
	DefaultRewardKind = reward.KindMargin
	// DefaultChoiceShare is the share of the RL search's judgements kept
	// for choosing its final prompt among its candidates.
	DefaultChoiceShare = 0.25
	// DefaultCandidates is how many of its best candidates the RL search
	// chooses among.
	DefaultCandidates = 64
	// DefaultHalvingFirst is the lines each prompt is first judged on in
	// the successive-halving baseline.
	DefaultHalvingFirst = 4
)

// The baselines a task may run beside the search (baselines.run), each at
// the search's judgements.
const (
	// BestOfN: random prompts, each judged on all of train and dev, the
	// best kept.
	BestOfN = "best-of-n"
	// Halving: successive halving over random prompts.
	Halving = "halving"
	// OneBatch: random prompts judged on one training batch, the best
	// kept (the weakest of the three; kept for comparison with earlier
	// results).
	OneBatch = "random"
)

// Baselines lists every baseline name, in the order results show them.
var Baselines = []string{BestOfN, Halving, OneBatch}

// DefaultBaselines are the baselines a task runs when it names none.
var DefaultBaselines = []string{BestOfN, Halving}

// Task is a validated task file. Every field is filled (defaults applied);
// Test is nil when the file names no test set.
type Task struct {
	// Name identifies the task in reports.
	Name string
	// Train, Dev and Test are the datasets; each example's Label is one of
	// Labels' names.
	Train, Dev, Test []Example
	// Labels are the classes in file order, each with its verbalizer.
	Labels []Label
	// Template is the text sent for one example, holding PromptPlaceholder
	// and usually InputPlaceholder.
	Template string
	// Endpoint scores the filled templates.
	Endpoint Endpoint
	// Model is the model id sent in requests.
	Model string
	// PromptLength is the number of tokens in a searched prompt.
	PromptLength int
	// Steps, PromptsPerStep and ExamplesPerStep size the search.
	Steps, PromptsPerStep, ExamplesPerStep int
	// Seed seeds the search's random number generator.
	Seed int64
	// Concurrency bounds scoring calls in flight.
	Concurrency int
	// SpendCapUSD stops the search once this much has been spent (as
	// reported by the proxy's Stint-Cost-Usd); 0 means no cap of the
	// search's own (the proxy's budgets still apply).
	SpendCapUSD float64
	// Prices price the cost forecast; nil when the file has no prices
	// section (a search's --input-price and --output-price override it).
	Prices *Prices
	// TopLogprobs is how many next-token log-probabilities to ask for.
	TopLogprobs int
	// ManualPrompts are hand-written prompts to compare the search against.
	ManualPrompts []string
	// Reward configures the classification reward.
	Reward reward.Config
	// AllowList restricts the tokens a searched prompt may use.
	AllowList AllowList
	// Policy tunes the learner.
	Policy PolicySettings
	// AutoFactor is set when the file leaves reward.scale.factor out: the
	// search then scales rewards by AutoRewardFactor of its action count.
	AutoFactor bool
	// Choose sets how the RL search picks its final prompt.
	Choose ChooseSettings
	// Baselines sets the baselines run beside the search.
	Baselines BaselineSettings
}

// ChooseSettings set the RL search's final choice: it keeps Share of its
// judgements for choosing, by successive halving on the train and dev
// lines, among its Candidates best prompts.
type ChooseSettings struct {
	Share      float64
	Candidates int
}

// BaselineSettings name the baselines a search runs (Run, names from
// Baselines) and the first depth of the halving baseline.
type BaselineSettings struct {
	Run          []string
	HalvingFirst int
}

// Prices are a model's prices in USD per million tokens. They only price
// the forecast a search prints before it starts: an estimate. The spend a
// search stops at is what the proxy reports, and the provider's bill is
// the record.
type Prices struct {
	InputPerMillion, OutputPerMillion float64
}

// PolicySettings tune the soft Q-learning policy.
type PolicySettings struct {
	// LearningRate is Adam's step size (DefaultLearningRate when unset).
	LearningRate float64
	// TopK is how many of the most likely tokens sampling draws from; 0
	// means the policy's default.
	TopK int
	// TargetRate is τ of the target network's Polyak update; 0 means the
	// policy's default.
	TargetRate float64
}

// AutoRewardFactor is the reward scale used when a task sets none, for
// prompts of length L over |A| actions: c·L·ln|A|, with c = 5 for the
// gap reward and MarginFactorScale for the margin reward. A
// near-uniform policy's soft value over a whole prompt is about L·ln|A|,
// so rewards on that scale move the policy within the search's steps
// instead of being drowned by the entropy term; c sets how sharply it
// then prefers the prompts that did well. The gap reward's 5 was measured
// on the demo task; the margin reward's constant was chosen on the task
// suite's train and dev lines (see the README).
func AutoRewardFactor(kind reward.Kind, promptLength, actions int) float64 {
	if promptLength < 1 || actions < 2 {
		return 1
	}
	c := 5.0
	if kind == reward.KindMargin {
		c = MarginFactorScale
	}
	return c * float64(promptLength) * math.Log(float64(actions))
}

// MarginFactorScale is c of AutoRewardFactor for the margin reward.
const MarginFactorScale = 2.5

// Label is one class and the single token that stands for it.
type Label struct {
	// Name is the label as written in the datasets.
	Name string
	// Verbalizer is the token read as the model's answer, as the API names
	// it in log-probabilities (usually with a leading space, " great").
	Verbalizer string
}

// Example is one dataset row.
type Example struct {
	Text, Label string
}

// AllowList restricts the action vocabulary of the search: the tokens a
// prompt may be built from. The zero value allows every token.
type AllowList struct {
	// WordInitial allows only tokens that start a word (a leading space).
	WordInitial bool
	// LettersOnly allows only tokens whose text, past a leading space, is
	// letters.
	LettersOnly bool
	// MinChars, when positive, allows only tokens with at least that many
	// characters past a leading space (short pieces like " a" rarely carry
	// meaning a prompt can use).
	MinChars int
	// Exclude lists tokens never to use (for instance the verbalizers).
	Exclude []string
}

// Allowed reports whether token (its text as the API names it) may be used
// in a prompt.
func (a AllowList) Allowed(token string) bool {
	if token == "" {
		return false
	}
	for _, x := range a.Exclude {
		if x == token {
			return false
		}
	}
	rest, initial := strings.CutPrefix(token, " ")
	if a.WordInitial && (!initial || rest == "") {
		return false
	}
	if a.MinChars > 0 && utf8.RuneCountInString(rest) < a.MinChars {
		return false
	}
	if a.LettersOnly {
		if rest == "" {
			return false
		}
		for _, r := range rest {
			if !unicode.IsLetter(r) {
				return false
			}
		}
	}
	return true
}

// Fill returns the template with input and prompt substituted. Every
// occurrence of a placeholder is replaced in one pass over the template, so
// a placeholder-like text inside input or prompt is left as it is.
func Fill(template, input, prompt string) string {
	return strings.NewReplacer(InputPlaceholder, input, PromptPlaceholder, prompt).Replace(template)
}

// Fill returns t's template filled with input and prompt.
func (t *Task) Fill(input, prompt string) string { return Fill(t.Template, input, prompt) }

// Verbalizers returns the labels' verbalizers in label order.
func (t *Task) Verbalizers() []string {
	out := make([]string, len(t.Labels))
	for i, l := range t.Labels {
		out[i] = l.Verbalizer
	}
	return out
}

// LabelIndex returns the index in Labels of name, or −1.
func (t *Task) LabelIndex(name string) int {
	for i, l := range t.Labels {
		if l.Name == name {
			return i
		}
	}
	return -1
}
