package task

import "go.yaml.in/yaml/v3"

// rawTask is the task file as written. Pointers tell an absent field
// (default) from an explicit zero.
type rawTask struct {
	Name            string     `yaml:"name"`
	Data            *rawData   `yaml:"data"`
	Labels          yaml.Node  `yaml:"labels"` // a mapping, read in file order
	Template        string     `yaml:"template"`
	Endpoint        string     `yaml:"endpoint"`
	Model           string     `yaml:"model"`
	PromptLength    *int       `yaml:"prompt_length"`
	Steps           *int       `yaml:"steps"`
	PromptsPerStep  *int       `yaml:"prompts_per_step"`
	ExamplesPerStep *int       `yaml:"examples_per_step"`
	Seed            int64      `yaml:"seed"`
	Concurrency     *int       `yaml:"concurrency"`
	SpendCapUSD     float64    `yaml:"spend_cap_usd"`
	Prices          *rawPrices `yaml:"prices"`
	TopLogprobs     *int       `yaml:"top_logprobs"`
	ManualPrompts   []string   `yaml:"manual_prompts"`
	Reward          *rawReward `yaml:"reward"`
	AllowList       *rawAllow  `yaml:"allow_list"`
	Policy          *rawPolicy `yaml:"policy"`
	Choose          *rawChoose `yaml:"choose"`
	Baselines       *rawBase   `yaml:"baselines"`
}

type rawChoose struct {
	Share      *float64 `yaml:"share"`
	Candidates *int     `yaml:"candidates"`
}

type rawBase struct {
	Run          []string `yaml:"run"`
	HalvingFirst *int     `yaml:"halving_first_lines"`
}

type rawData struct {
	Format     string `yaml:"format"`
	Train      string `yaml:"train"`
	Dev        string `yaml:"dev"`
	Test       string `yaml:"test"`
	TextField  string `yaml:"text_field"`
	LabelField string `yaml:"label_field"`
}

type rawReward struct {
	Kind           *string   `yaml:"kind"`
	Margin         *float64  `yaml:"margin"`
	Correct        *float64  `yaml:"correct"`
	Wrong          *float64  `yaml:"wrong"`
	ZScore         *bool     `yaml:"zscore"`
	Scale          *rawScale `yaml:"scale"`
	MissingLogprob *float64  `yaml:"missing_logprob"`
}

type rawScale struct {
	Factor *float64 `yaml:"factor"`
	Clip   *float64 `yaml:"clip"`
}

type rawAllow struct {
	WordInitial bool     `yaml:"word_initial"`
	LettersOnly bool     `yaml:"letters_only"`
	MinChars    *int     `yaml:"min_chars"`
	Exclude     []string `yaml:"exclude"`
}

type rawPrices struct {
	InputPerMillion  *float64 `yaml:"input_per_million"`
	OutputPerMillion *float64 `yaml:"output_per_million"`
}

type rawPolicy struct {
	LearningRate *float64 `yaml:"learning_rate"`
	TopK         *int     `yaml:"top_k"`
	TargetRate   *float64 `yaml:"target_rate"`
}
