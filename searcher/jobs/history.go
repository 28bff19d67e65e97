package jobs

import (
	"encoding/csv"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strconv"

	"github.com/stintlab/stint/searcher/search"
)

// History is a job's learning curve so far, as GET /jobs/{id}/history
// answers it.
type History struct {
	ID string `json:"id"`
	// Source is the file the points were read from: history.csv once the
	// job has finished, the checkpoint while it runs, "" before its first
	// checkpoint.
	Source string         `json:"source"`
	Points []search.Point `json:"points"`
}

// History reads what job id has written of its curve: history.csv in its
// output directory when the search finished, else the history kept in its
// last checkpoint.
func (m *Manager) History(id string) (History, error) {
	if _, err := m.Get(id); err != nil {
		return History{}, err
	}
	h := History{ID: id, Points: []search.Point{}}
	out := m.Out(id)
	pts, err := readHistoryCSV(filepath.Join(out, "history.csv"))
	switch {
	case err == nil:
		h.Source, h.Points = "history.csv", pts
		return h, nil
	case !errors.Is(err, os.ErrNotExist):
		return History{}, err
	}
	pts, err = readCheckpointHistory(filepath.Join(out, search.CheckpointFile))
	switch {
	case err == nil:
		h.Source, h.Points = search.CheckpointFile, pts
	case !errors.Is(err, os.ErrNotExist):
		return History{}, err
	}
	return h, nil
}

// readHistoryCSV reads a history.csv as search.WriteHistory writes it.
func readHistoryCSV(path string) ([]search.Point, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	return ParseHistoryCSV(f, path)
}

// ParseHistoryCSV reads a history.csv as search.WriteHistory writes it;
// path names it in errors.
func ParseHistoryCSV(r io.Reader, path string) ([]search.Point, error) {
	cr := csv.NewReader(r)
	cr.FieldsPerRecord = 6
	head, err := cr.Read()
	if err != nil {
		return nil, fmt.Errorf("jobs: %s: header: %w", path, err)
	}
	if head[0] != "step" || head[2] != "train_accuracy" || head[3] != "dev_accuracy" {
		return nil, fmt.Errorf("jobs: %s: header %q is not a search history's", path, head)
	}
	pts := []search.Point{}
	for {
		rec, err := cr.Read()
		if errors.Is(err, io.EOF) {
			return pts, nil
		}
		if err != nil {
			return nil, fmt.Errorf("jobs: %s: %w", path, err)
		}
		line, _ := cr.FieldPos(0)
		p, err := pointOf(rec)
		if err != nil {
			return nil, fmt.Errorf("jobs: %s line %d: %w", path, line, err)
		}
		pts = append(pts, p)
	}
}

// pointOf parses one history line: step, mean_reward, train_accuracy,
// dev_accuracy (empty when not evaluated), loss, greedy_prompt.
func pointOf(rec []string) (search.Point, error) {
	p := search.Point{Prompt: rec[5], DevAcc: -1}
	var err error
	if p.Step, err = strconv.Atoi(rec[0]); err != nil {
		return p, fmt.Errorf("step %q: %w", rec[0], err)
	}
	fields := []struct {
		name string
		text string
		dst  *float64
	}{{"mean_reward", rec[1], &p.MeanReward}, {"train_accuracy", rec[2], &p.TrainAcc}, {"dev_accuracy", rec[3], &p.DevAcc}, {"loss", rec[4], &p.Loss}}
	for _, f := range fields {
		if f.text == "" && f.name == "dev_accuracy" {
			continue
		}
		if *f.dst, err = strconv.ParseFloat(f.text, 64); err != nil {
			return p, fmt.Errorf("%s %q: %w", f.name, f.text, err)
		}
	}
	return p, nil
}

// readCheckpointHistory reads only the history of a checkpoint.
func readCheckpointHistory(path string) ([]search.Point, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	return ParseCheckpointHistory(f, path)
}

// ParseCheckpointHistory reads only the history of a checkpoint
// (search.WriteState's); path names it in errors.
func ParseCheckpointHistory(r io.Reader, path string) ([]search.Point, error) {
	var st struct {
		History []search.Point `json:"history"`
	}
	if err := json.NewDecoder(r).Decode(&st); err != nil {
		return nil, fmt.Errorf("jobs: %s: %w", path, err)
	}
	if st.History == nil {
		st.History = []search.Point{}
	}
	return st.History, nil
}
