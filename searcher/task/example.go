package task

import (
	"path"
	"path/filepath"
	"strings"
)

// ExampleFile is a complete, commented task file in an invented scenario:
// the reading corner of the Larkspur Hill co-op sorts short sentences by
// who they are about, naming them after the two children of its picture
// books, Lily and Tim. Its datasets ship in the repository's
// testdata/search folder (reading-corner-train.jsonl, -dev.jsonl and
// -test.jsonl); parse it with that folder as dir. The verbalizers are single
// tokens of the stories260K model, so the offline demo can score it.
const ExampleFile = exampleFile

// ExampleDataDir is the folder of the example's datasets, from the
// repository root.
const ExampleDataDir = "testdata/search"

// ExampleAt returns ExampleFile with its data paths in dir (slash-separated
// or the system's), for a task file written where dir is reachable from:
// ExampleAt(ExampleDataDir) is the example to save in the repository root,
// as "stint search example > task.yaml" does.
func ExampleAt(dir string) string {
	r := strings.NewReplacer(
		"train: reading-corner-train.jsonl", "train: "+path.Join(filepath.ToSlash(dir), "reading-corner-train.jsonl"),
		"dev: reading-corner-dev.jsonl", "dev: "+path.Join(filepath.ToSlash(dir), "reading-corner-dev.jsonl"),
		"test: reading-corner-test.jsonl", "test: "+path.Join(filepath.ToSlash(dir), "reading-corner-test.jsonl"),
	)
	return r.Replace(ExampleFile)
}

const exampleFile = `# A prompt-search task: the Larkspur Hill co-op's reading corner names who a
# short sentence is about, after its picture books' two children. The
# sentences carry only pronouns ("she", "his", "the girl"), so a prompt that
# ties them to the names helps the model.
name: reading-corner

# Datasets, relative to this file. JSONL (one {"text": ..., "label": ...}
# object a line) or CSV with a header row; the format follows the extension
# unless format is set. text_field and label_field name the JSON fields or
# CSV columns (defaults: text, label).
data:
  train: reading-corner-train.jsonl
  dev: reading-corner-dev.jsonl
  test: reading-corner-test.jsonl   # optional: held out for the final report
  text_field: text
  label_field: label

# Each label and its verbalizer: the single token (as the API names it,
# leading space included) whose next-token probability is the model's vote.
labels:
  lily: " Lily"
  tim: " Tim"

# What is sent for one example. {prompt} (required) is the searched prompt,
# {input} the example's text.
template: "{input} {prompt} The name was"

endpoint: completions             # completions (batched prompt arrays) or chat
model: stories260K

prompt_length: 5                  # tokens in a searched prompt
steps: 90
prompts_per_step: 16              # prompts sampled per step (at least 2: rewards are compared across them)
examples_per_step: 8              # training examples each prompt is scored on per step
seed: 7
concurrency: 4                    # scoring calls in flight
spend_cap_usd: 5.00               # stop once the proxy reports this much spent; 0 for no cap of the search's own
# Prices for the cost forecast printed before the search starts, USD per
# million tokens. Example prices, verify before use: these are invented for
# the local demo model; put your provider's current prices for your model.
# The forecast is an estimate (it ignores the cache); the spend the search
# stops at is what the proxy reports, and the provider's bill is the record.
# --input-price and --output-price override them. With a spend cap and no
# prices the search refuses to start (unless --over-cap).
prices:
  input_per_million: 0.50
  output_per_million: 1.50

top_logprobs: 20                  # next-token log-probabilities asked for; hosted chat APIs cap this at about 20

# Hand-written prompts the search is compared with.
manual_prompts:
  - "Lily is a girl. Tim is a boy."
  - "A story"

# The reward for one prompt on one line. margin (the default): +1 when the
# true label wins, -1 when it does not, plus margin x Gap (Gap: the true
# label's probability minus the largest other one, over the verbalizers),
# centred per line across the step's prompts. gap: the published reward
# (Deng et al. 2022, RLPrompt): 200 x Gap when right, 180 x Gap when wrong,
# z-scored per line (set correct and wrong to change 200 and 180). Either is
# then multiplied by factor and clipped to +-clip (0: none).
reward:
  kind: margin
  margin: 0.5
  # scale: {factor: 50, clip: 0}  # unset factor: 2.5 x prompt_length x ln(allowed tokens)
                                  # for margin, 5 x ... for gap
  # missing_logprob: -20          # log-probability of a verbalizer absent from the top-k list;
                                  # unset: the lowest one returned minus ln 2

# How the search picks its final prompt: it keeps share of its judgements
# and chooses among its candidates best prompts (by their accuracy so far)
# by successive halving on the train and dev lines: judged on a few lines,
# the better half kept and judged on twice as many, until one is left. The
# baselines choose by the same rule.
choose:
  share: 0.25
  candidates: 64

# Baselines run beside the search, each given the search's judgements:
# best-of-n (random prompts, each judged on all train and dev lines, the
# best kept), halving (successive halving over random prompts, from
# halving_first_lines lines each) and random (random prompts judged on one
# training batch, the best kept). [] runs none.
baselines:
  run: [best-of-n, halving]
  halving_first_lines: 4

# Which tokens the search may build prompts from.
allow_list:
  word_initial: true              # only tokens that start a word
  letters_only: true
  min_chars: 2                    # at least this many letters past the space
  exclude: [" Lily", " Tim"]      # never the verbalizers themselves

# The learner (soft Q-learning). All optional.
policy:
  learning_rate: 0.003            # Adam's step size
  top_k: 256                      # sampling draws from the k most likely tokens
  target_rate: 0.001              # Polyak rate of the target network
`
