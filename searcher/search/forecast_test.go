package search

import (
	"path/filepath"
	"testing"

	"github.com/stintlab/stint/searcher/scorer"
	"github.com/stintlab/stint/searcher/task"
)

func TestPlanForTheExampleTask(t *testing.T) {
	tk, err := task.Parse([]byte(task.ExampleFile), filepath.Join("..", "..", "testdata", "search"), nil)
	if err != nil {
		t.Fatal(err)
	}
	p := PlanFor(tk, 0)
	// Hand-worked from the example: 200 steps × 8 prompts × 16 examples =
	// 25,600 scorings for the search and as many for random search; dev
	// (20 sentences) every 20 steps is 10 × 20 = 200, and the 6 contenders
	// (rl, rl-best, empty, 2 manual, random) on 40 + 20 + 40 sentences are
	// 600.
	if p.Search != 25600 || p.Random != 25600 || p.Evaluation != 800 || p.Judgements() != 52000 {
		t.Errorf("plan %+v, want 25600 + 25600 + 800", p)
	}
	if p.TokensPerJudgement <= 0 {
		t.Errorf("tokens per judgement %d", p.TokensPerJudgement)
	}
	// 52,000 scorings × T tokens at 1 USD per million in, plus one output
	// token each at 2 USD per million.
	want := (52000*float64(p.TokensPerJudgement)*1 + 52000*2) / 1e6
	if got := p.Cost(scorer.Price{InputPerMillion: 1, OutputPerMillion: 2}); got != want {
		t.Errorf("cost %v, want %v", got, want)
	}
}
