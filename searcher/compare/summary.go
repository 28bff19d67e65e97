package compare

import (
	"fmt"
	"math"
	"slices"
	"strings"

	"github.com/stintlab/stint/searcher/search"
	"github.com/stintlab/stint/searcher/survey"
	"github.com/stintlab/stint/searcher/task"
)

// Stat is a mean and its spread (population standard deviation) over N
// values.
type Stat struct {
	Mean float64 `json:"mean"`
	SD   float64 `json:"sd"`
	N    int     `json:"n"`
}

func statOf(xs []float64) Stat {
	m, sd := survey.MeanSD(xs)
	return Stat{Mean: m, SD: sd, N: len(xs)}
}

// TaskSummary is one task over its seeds. Accuracies are test accuracies.
type TaskSummary struct {
	Task string `json:"task"`
	// Methods maps each contender ("manual: <prompt>" for a manual
	// prompt) to its test accuracy over the seeds; Judgements and Spend
	// to what finding its prompt took, on average.
	Methods    map[string]Stat    `json:"test_accuracy"`
	Judgements map[string]float64 `json:"judgements"`
	Spend      map[string]float64 `json:"spend"`
	// Strongest is the baseline with the best mean at equal judgements
	// (best-of-n or halving), StrongestAtSpend at equal spend.
	Strongest        string `json:"strongest_baseline"`
	StrongestAtSpend string `json:"strongest_baseline_at_spend,omitempty"`
	// The RL search's mean minus the strongest baseline's, at equal
	// judgements and at equal spend, minus the empty prompt's, and minus
	// the test accuracy of the headroom survey's best prompt (0 without
	// a survey: see HasSurvey).
	VsStrongest        float64 `json:"rl_minus_strongest"`
	VsStrongestAtSpend float64 `json:"rl_minus_strongest_at_spend"`
	VsEmpty            float64 `json:"rl_minus_empty"`
	VsSurvey           float64 `json:"rl_minus_survey_best"`
	HasSurvey          bool    `json:"has_survey"`
	SurveyBest         float64 `json:"survey_best_test_accuracy"`
}

// Summary is the whole comparison.
type Summary struct {
	Tasks []TaskSummary `json:"tasks"`
	// Methods maps each contender present in every task to the mean of
	// its per-task means, and their spread across tasks.
	Methods map[string]Stat `json:"suite"`
	// Strongest and StrongestAtSpend average the per-task strongest
	// baselines.
	Strongest        Stat `json:"strongest_baseline"`
	StrongestAtSpend Stat `json:"strongest_baseline_at_spend"`
	Goal             Goal `json:"goal"`
	Seeds            int  `json:"seeds"`
}

// Goal checks the RL search against what it is asked to reach: at least
// the strongest baseline on the suite's mean and ahead of it on at least
// half the tasks, no task more than 2 points behind it nor below the
// empty prompt, 3 points ahead at equal spend, within 2 points of the
// headroom survey's best on every task.
type Goal struct {
	MeanVsStrongest        float64  `json:"mean_rl_minus_strongest"`
	Ahead                  int      `json:"tasks_ahead"`
	Tasks                  int      `json:"tasks"`
	WorstVsStrongest       float64  `json:"worst_rl_minus_strongest"`
	BelowEmpty             []string `json:"tasks_below_empty"`
	MeanVsStrongestAtSpend float64  `json:"mean_rl_minus_strongest_at_spend"`
	WorstVsSurvey          float64  `json:"worst_rl_minus_survey_best"`
	Met                    []string `json:"met"`
	Missed                 []string `json:"missed"`
}

func methodKey(r Row) string {
	if r.Method == search.MethodManual {
		return "manual: " + r.Prompt
	}
	return r.Method
}

// Summarize sums cells and surveys up.
func Summarize(cells []Cell, surveys []survey.Report) Summary {
	var s Summary
	byTask := map[string][]Cell{}
	var order []string
	for _, c := range cells {
		if _, ok := byTask[c.Task]; !ok {
			order = append(order, c.Task)
		}
		byTask[c.Task] = append(byTask[c.Task], c)
		s.Seeds = max(s.Seeds, len(byTask[c.Task]))
	}
	best := map[string]float64{}
	for _, rep := range surveys {
		best[rep.Task] = rep.BestTest
	}
	suite := map[string][]float64{}
	var strongest, strongestAtSpend []float64
	for _, name := range order {
		ts := TaskSummary{Task: name, Methods: map[string]Stat{}, Judgements: map[string]float64{}, Spend: map[string]float64{}}
		acc := map[string][]float64{}
		var keys []string
		for _, c := range byTask[name] {
			for _, r := range c.Rows {
				k := methodKey(r)
				if _, ok := acc[k]; !ok {
					keys = append(keys, k)
				}
				acc[k] = append(acc[k], r.TestAcc)
				ts.Judgements[k] += float64(r.Judgements) / float64(len(byTask[name]))
				ts.Spend[k] += r.Spend / float64(len(byTask[name]))
			}
		}
		for _, k := range keys {
			ts.Methods[k] = statOf(acc[k])
			suite[k] = append(suite[k], ts.Methods[k].Mean)
		}
		pickBest := func(methods ...string) (string, float64) {
			name, m := "", math.Inf(-1)
			for _, k := range methods {
				if st, ok := ts.Methods[k]; ok && st.Mean > m {
					name, m = k, st.Mean
				}
			}
			return name, m
		}
		rl := ts.Methods[search.MethodRL].Mean
		var sm float64
		if ts.Strongest, sm = pickBest(task.BestOfN, task.Halving); ts.Strongest != "" {
			ts.VsStrongest = rl - sm
			strongest = append(strongest, sm)
		}
		if ts.StrongestAtSpend, sm = pickBest(BestOfNAtSpend, HalvingAtSpend); ts.StrongestAtSpend != "" {
			ts.VsStrongestAtSpend = rl - sm
			strongestAtSpend = append(strongestAtSpend, sm)
		}
		ts.VsEmpty = rl - ts.Methods[search.MethodEmpty].Mean
		if b, ok := best[name]; ok && b >= 0 {
			ts.HasSurvey, ts.SurveyBest, ts.VsSurvey = true, b, rl-b
		}
		s.Tasks = append(s.Tasks, ts)
	}
	s.Methods = map[string]Stat{}
	for k, xs := range suite {
		if len(xs) == len(order) {
			s.Methods[k] = statOf(xs)
		}
	}
	s.Strongest, s.StrongestAtSpend = statOf(strongest), statOf(strongestAtSpend)
	s.Goal = goalOf(s)
	return s
}

func goalOf(s Summary) Goal {
	g := Goal{Tasks: len(s.Tasks), WorstVsStrongest: math.Inf(1), WorstVsSurvey: math.Inf(1)}
	var vs, vsSpend []float64
	surveyed := 0
	for _, t := range s.Tasks {
		vs = append(vs, t.VsStrongest)
		vsSpend = append(vsSpend, t.VsStrongestAtSpend)
		if t.VsStrongest > 0 {
			g.Ahead++
		}
		g.WorstVsStrongest = min(g.WorstVsStrongest, t.VsStrongest)
		if t.VsEmpty < 0 {
			g.BelowEmpty = append(g.BelowEmpty, t.Task)
		}
		if t.HasSurvey {
			surveyed++
			g.WorstVsSurvey = min(g.WorstVsSurvey, t.VsSurvey)
		}
	}
	g.MeanVsStrongest, g.MeanVsStrongestAtSpend = statOf(vs).Mean, statOf(vsSpend).Mean
	check := func(ok bool, what string) {
		if ok {
			g.Met = append(g.Met, what)
		} else {
			g.Missed = append(g.Missed, what)
		}
	}
	check(s.Seeds >= 5, fmt.Sprintf("at least 5 seeds (%d)", s.Seeds))
	check(g.MeanVsStrongest >= 0, fmt.Sprintf("suite mean at least the strongest baseline's (%+.1f points)", 100*g.MeanVsStrongest))
	check(2*g.Ahead >= g.Tasks, fmt.Sprintf("ahead of it on at least half the tasks (%d of %d)", g.Ahead, g.Tasks))
	check(g.WorstVsStrongest >= -0.02, fmt.Sprintf("no task more than 2 points behind it (worst %+.1f)", 100*g.WorstVsStrongest))
	check(len(g.BelowEmpty) == 0, fmt.Sprintf("no task below the empty prompt (%s)", orNone(g.BelowEmpty)))
	check(g.MeanVsStrongestAtSpend >= 0.03, fmt.Sprintf("3 points ahead at equal spend (%+.1f)", 100*g.MeanVsStrongestAtSpend))
	if surveyed == g.Tasks && surveyed > 0 {
		check(g.WorstVsSurvey >= -0.02, fmt.Sprintf("within 2 points of the survey's best on every task (worst %+.1f)", 100*g.WorstVsSurvey))
	} else {
		g.WorstVsSurvey = 0
	}
	return g
}

func orNone(xs []string) string {
	if len(xs) == 0 {
		return "none"
	}
	return strings.Join(xs, ", ")
}

// Report renders the summary as text tables: one per task, then the
// suite's.
func Report(s Summary, priced bool) string {
	var b strings.Builder
	unit := "SPEND (texts)"
	if priced {
		unit = "SPEND USD"
	}
	for _, t := range s.Tasks {
		fmt.Fprintf(&b, "== %s (%d seeds; test accuracy, mean ± sd over seeds)\n", t.Task, t.Methods[search.MethodRL].N)
		fmt.Fprintf(&b, "%-40s %14s %11s %14s\n", "METHOD", "TEST", "JUDGEMENTS", unit)
		for _, k := range sortedMethods(t.Methods) {
			st := t.Methods[k]
			fmt.Fprintf(&b, "%-40s %6.1f ± %4.1f %11.0f %14.6g\n", clip(k, 40), 100*st.Mean, 100*st.SD, t.Judgements[k], t.Spend[k])
		}
		if t.HasSurvey {
			fmt.Fprintf(&b, "%-40s %6.1f\n", "headroom survey's best prompt", 100*t.SurveyBest)
		}
		fmt.Fprintf(&b, "rl vs strongest baseline (%s): %+.1f; at equal spend (%s): %+.1f\n\n", t.Strongest, 100*t.VsStrongest, t.StrongestAtSpend, 100*t.VsStrongestAtSpend)
	}
	fmt.Fprintf(&b, "== suite: %d tasks × %d seeds (mean of the tasks' means, sd across tasks)\n", len(s.Tasks), s.Seeds)
	fmt.Fprintf(&b, "%-40s %14s\n", "METHOD", "TEST")
	for _, k := range sortedMethods(s.Methods) {
		fmt.Fprintf(&b, "%-40s %6.1f ± %4.1f\n", clip(k, 40), 100*s.Methods[k].Mean, 100*s.Methods[k].SD)
	}
	fmt.Fprintf(&b, "%-40s %6.1f ± %4.1f\n", "strongest baseline per task", 100*s.Strongest.Mean, 100*s.Strongest.SD)
	fmt.Fprintf(&b, "%-40s %6.1f ± %4.1f\n", "strongest baseline per task, equal spend", 100*s.StrongestAtSpend.Mean, 100*s.StrongestAtSpend.SD)
	for _, m := range s.Goal.Met {
		fmt.Fprintf(&b, "met:    %s\n", m)
	}
	for _, m := range s.Goal.Missed {
		fmt.Fprintf(&b, "missed: %s\n", m)
	}
	return b.String()
}

// methodOrder is the order rows are shown in; others follow by name.
var methodOrder = []string{search.MethodRL, search.MethodRLGreedy, task.BestOfN, task.Halving, task.OneBatch, BestOfNAtSpend, HalvingAtSpend, search.MethodEmpty}

func sortedMethods[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	rank := func(k string) int {
		if i := slices.Index(methodOrder, k); i >= 0 {
			return i
		}
		return len(methodOrder)
	}
	slices.SortFunc(keys, func(a, b string) int {
		if ra, rb := rank(a), rank(b); ra != rb {
			return ra - rb
		}
		return strings.Compare(a, b)
	})
	return keys
}

func clip(s string, n int) string {
	if r := []rune(s); len(r) > n {
		return string(r[:n-1]) + "…"
	}
	return s
}
