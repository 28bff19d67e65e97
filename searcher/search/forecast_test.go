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
	// Hand-worked from the example: 200 steps × 16 prompts × 16 examples =
	// 51,200 scorings for the search and as many for random search; dev
	// (20 notes) every 20 steps is 10 × 20 = 200, and the 5 contenders
	// (rl, empty, 2 manual, random) on 40 + 20 + 20 notes are 400.
	if p.Search != 51200 || p.Random != 51200 || p.Evaluation != 600 || p.Judgements() != 103000 {
		t.Errorf("plan %+v, want 51200 + 51200 + 600", p)
	}
	if p.TokensPerJudgement <= 0 {
		t.Errorf("tokens per judgement %d", p.TokensPerJudgement)
	}
	// 103,000 scorings × T tokens at 1 USD per million in, plus one output
	// token each at 2 USD per million.
	want := (103000*float64(p.TokensPerJudgement)*1 + 103000*2) / 1e6
	if got := p.Cost(scorer.Price{InputPerMillion: 1, OutputPerMillion: 2}); got != want {
		t.Errorf("cost %v, want %v", got, want)
	}
}
