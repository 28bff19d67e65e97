package reward

import (
	"math"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// near reports whether a and b agree to 1e-9.
func near(a, b float64) bool { return math.Abs(a-b) < 1e-9 }

var verbs = []string{" happy", " big"}

// The check values below are worked by hand from the reward of Deng et al.
// 2022 (arXiv 2205.12548): R = 200·Gap when correct (λ2), 180·Gap when wrong
// (λ1), Gap = P(true) − max P(other) over the renormalised verbalizers.
func TestRawReward(t *testing.T) {
	ln := math.Log
	tests := []struct {
		name    string
		cfg     Config
		top     map[string]float64
		verbs   []string
		truth   int
		gap     float64
		correct bool
		reward  float64
		floored int
	}{
		{
			// 0.6 and 0.2 renormalise to 0.75 and 0.25; Gap 0.5; 200·0.5 = 100.
			name: "correct", top: map[string]float64{" happy": ln(0.6), " big": ln(0.2), " the": ln(0.2)},
			verbs: verbs, truth: 0, gap: 0.5, correct: true, reward: 100,
		},
		{
			// Same answer, true label " big": Gap 0.25 − 0.75 = −0.5; 180·(−0.5) = −90.
			name: "wrong", top: map[string]float64{" happy": ln(0.6), " big": ln(0.2), " the": ln(0.2)},
			verbs: verbs, truth: 1, gap: -0.5, correct: false, reward: -90,
		},
		{
			// Three labels 0.5, 0.3, 0.2 (already summing to 1), true the
			// second: Gap 0.3 − 0.5 = −0.2; 180·(−0.2) = −36.
			name: "three labels", top: map[string]float64{"a": ln(0.5), "b": ln(0.3), "c": ln(0.2)},
			verbs: []string{"a", "b", "c"}, truth: 1, gap: -0.2, correct: false, reward: -36,
		},
		{
			// " big" missing: floor = lowest returned ln 0.25 − ln 2 = ln 0.125;
			// 0.5 and 0.125 renormalise to 0.8 and 0.2; Gap 0.6; 200·0.6 = 120.
			name: "default floor", top: map[string]float64{" happy": ln(0.5), " the": ln(0.25)},
			verbs: verbs, truth: 0, gap: 0.6, correct: true, reward: 120, floored: 1,
		},
		{
			// Fixed floor ln 0.5 equals " happy": 0.5 and 0.5; Gap 0, a tie,
			// counted wrong: 180·0 = 0.
			name: "fixed floor tie", cfg: Config{Floor: ln(0.5)}, top: map[string]float64{" happy": ln(0.5)},
			verbs: verbs, truth: 0, gap: 0, correct: false, reward: 0, floored: 1,
		},
		{
			// Custom constants: 0.75/0.25, Gap 0.5, Correct 10 → 5.
			name: "custom constants", cfg: Config{Correct: 10, Wrong: 1}, top: map[string]float64{" happy": ln(0.3), " big": ln(0.1)},
			verbs: verbs, truth: 0, gap: 0.5, correct: true, reward: 5,
		},
		{
			// Log-probabilities far below exp's range still renormalise:
			// −2000 and −2000 − ln 3 are 0.75 and 0.25 of their sum; 200·0.5.
			name: "no underflow", top: map[string]float64{" happy": -2000, " big": -2000 - ln(3)},
			verbs: verbs, truth: 0, gap: 0.5, correct: true, reward: 100,
		},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			probs, floored, err := tt.cfg.Probabilities(tt.top, tt.verbs)
			require.NoError(t, err)
			assert.Equal(t, tt.floored, floored, "floored = %d, want %d", floored, tt.floored)
			j, err := Judge(probs, tt.truth)
			require.NoError(t, err)
			assert.Falsef(t, !near(j.Gap, tt.gap) || j.Correct != tt.correct, "gap, correct = %v, %v; want %v, %v", j.Gap, j.Correct, tt.gap, tt.correct)
			got := tt.cfg.Raw(j)
			assert.Truef(t, near(got, tt.reward), "reward = %v, want %v", got, tt.reward)
		})
	}
}

func TestNormalize(t *testing.T) {
	// Column [100, −90]: mean 5, population std 95, so ±95/(95+1e-4).
	z2 := 95 / (95 + StdEpsilon)
	// Column [30, 0, −30]: mean 0, population variance (900+0+900)/3 = 600.
	z3 := 30 / (math.Sqrt(600) + StdEpsilon)
	tests := []struct {
		name string
		cfg  Config
		raw  [][]float64
		want [][]float64
	}{
		{"two prompts", Config{}, [][]float64{{100}, {-90}}, [][]float64{{z2}, {-z2}}},
		{"three prompts", Config{}, [][]float64{{30}, {0}, {-30}}, [][]float64{{z3}, {0}, {-z3}}},
		// Equal rewards: 0/(0+1e-4) = 0, not NaN.
		{"equal column", Config{}, [][]float64{{5, 1}, {5, -1}}, [][]float64{{0, 1 / (1 + StdEpsilon)}, {0, -1 / (1 + StdEpsilon)}}},
		// Factor 2 gives ±1.99999…, clipped to ±1.5.
		{"factor and clip", Config{Factor: 2, Clip: 1.5}, [][]float64{{100}, {-90}}, [][]float64{{1.5}, {-1.5}}},
		{"factor only", Config{Factor: 2}, [][]float64{{100}, {-90}}, [][]float64{{2 * z2}, {-2 * z2}}},
		{"no z-score", Config{NoZScore: true, Factor: 0.5}, [][]float64{{100}, {-90}}, [][]float64{{50}, {-45}}},
		{"empty", Config{}, nil, [][]float64{}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got := tt.cfg.Normalize(tt.raw)
			require.Len(t, got, len(tt.want), "got %d rows, want %d", len(got), len(tt.want))
			for p := range got {
				for i := range got[p] {
					assert.Truef(t, near(got[p][i], tt.want[p][i]), "[%d][%d] = %v, want %v", p, i, got[p][i], tt.want[p][i])
				}
			}
		})
	}
}

func TestScore(t *testing.T) {
	ln := math.Log
	// Two prompts, two inputs (truths " happy", " big").
	// Prompt 0: input 0 → 0.75/0.25, correct, 100; input 1 → " big" missing,
	//   floor ln 0.25 − ln 2 = ln 0.125 beside " happy" 0.5 → 0.8/0.2,
	//   truth " big": Gap −0.6, wrong, −108.
	// Prompt 1: input 0 → 0.25/0.75, wrong, −90; input 1 → 0.25/0.75,
	//   correct, 100.
	// Column 0 [100, −90]: ±95/(95+1e-4). Column 1 [−108, 100]: mean −4,
	//   std 104, ∓104/(104+1e-4).
	top := [][]map[string]float64{
		{{" happy": ln(0.6), " big": ln(0.2)}, {" happy": ln(0.5), " the": ln(0.25)}},
		{{" happy": ln(0.1), " big": ln(0.3)}, {" happy": ln(0.1), " big": ln(0.3)}},
	}
	s, err := Config{}.Score(top, []int{0, 1}, verbs)
	require.NoError(t, err)
	z0, z1 := 95/(95+StdEpsilon), 104/(104+StdEpsilon)
	wantRaw := [][]float64{{100, -108}, {-90, 100}}
	wantZ := [][]float64{{z0, -z1}, {-z0, z1}}
	for p := range wantRaw {
		for i := range wantRaw[p] {
			assert.Falsef(t, !near(s.Raw[p][i], wantRaw[p][i]) || !near(s.Rewards[p][i], wantZ[p][i]), "[%d][%d] raw %v z %v; want %v, %v", p, i, s.Raw[p][i], s.Rewards[p][i], wantRaw[p][i], wantZ[p][i])
		}
	}
	want := (z0 - z1) / 2
	assert.Truef(t, near(s.PerPrompt[0], want), "PerPrompt[0] = %v, want %v", s.PerPrompt[0], want)
	assert.Falsef(t, s.Accuracy[0] != 0.5 || s.Accuracy[1] != 0.5, "accuracy = %v, want [0.5 0.5]", s.Accuracy)
	assert.Falsef(t, s.Lookups != 8 || s.Floored != 1, "lookups, floored = %d, %d; want 8, 1", s.Lookups, s.Floored)
}

func TestErrors(t *testing.T) {
	tests := []struct {
		name string
		run  func() error
		want error
	}{
		{"no logprobs", func() error { _, _, err := Config{}.Probabilities(nil, verbs); return err }, ErrNoLogprobs},
		{"truth out of range", func() error { _, err := Judge([]float64{0.5, 0.5}, 2); return err }, ErrShape},
		{"one label", func() error { _, err := Judge([]float64{1}, 0); return err }, ErrShape},
		{"ragged step", func() error {
			_, err := Config{}.Score([][]map[string]float64{{{" big": -1}}}, []int{0, 1}, verbs)
			return err
		}, ErrShape},
		{"negative correct", func() error { return Config{Correct: -1}.Validate() }, ErrConfig},
		{"positive floor", func() error { return Config{Floor: 0.5}.Validate() }, ErrConfig},
		{"nan factor", func() error { return Config{Factor: math.NaN()}.Validate() }, ErrConfig},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			err := tt.run()
			assert.ErrorIs(t, err, tt.want, "err = %v, want %v", err, tt.want)
		})
	}
}
