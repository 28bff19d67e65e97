package scorer

// Price is a model's price in USD per million tokens.
type Price struct {
	InputPerMillion, OutputPerMillion float64
}

// Forecast estimates what scoring will cost before it starts: calls texts
// of about promptTokens tokens each, each generating one token, at price p.
// It is an estimate, and an upper bound only as good as its inputs: cache
// hits cost nothing (so a search that repeats pairs pays less), and
// promptTokens is a guess unless it came from the model's tokenizer (see
// EstimateTokens). The provider's bill is the record.
func Forecast(texts, promptTokens int, p Price) float64 {
	in := float64(texts) * float64(promptTokens) * p.InputPerMillion
	out := float64(texts) * 1 * p.OutputPerMillion
	return (in + out) / 1e6
}

// EstimateTokens bounds the tokens of text from above without a tokenizer:
// its UTF-8 bytes plus one (byte-level and byte-fallback tokenizers emit at
// most one token per byte; the one is a beginning-of-text token). Real
// counts are usually three to four times smaller for English.
func EstimateTokens(text string) int {
	return len(text) + 1
}
