package opsview

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"path"
)

// maxSidecarBody bounds one answer of the sidecar.
const maxSidecarBody = 4 << 20

// sidecarJob is the part of a job the sidecar's GET /jobs lists that the
// page shows (searcher/jobs.Status).
type sidecarJob struct {
	ID   string `json:"id"`
	Spec struct {
		Task string `json:"task"`
		Run  string `json:"run"`
	} `json:"spec"`
	State      string  `json:"state"`
	Step       int     `json:"step"`
	Steps      int     `json:"steps"`
	BestPrompt string  `json:"best_prompt"`
	TrainAcc   float64 `json:"train_accuracy"`
	DevAcc     float64 `json:"dev_accuracy"`
	Calls      int     `json:"scoring_calls"`
	CacheShare float64 `json:"cache_share"`
	SpentUSD   float64 `json:"spent_usd"`
	Error      string  `json:"error"`
	Sidecar    string  `json:"sidecar"`
	Attempts   int     `json:"attempts"`
}

// errUnreachable marks a sidecar that did not answer.
var errUnreachable = errors.New("sidecar unreachable")

// searches asks the sidecar for its jobs and the newest ones' histories,
// all within SidecarTimeout.
func (v *View) searches(ctx context.Context) SearchView {
	if v.o.Sidecar == "" {
		return SearchView{}
	}
	out := SearchView{Sidecar: redactURL(v.o.Sidecar)}
	ctx, cancel := context.WithTimeout(ctx, v.o.SidecarTimeout)
	defer cancel()
	var list struct {
		Jobs []sidecarJob `json:"jobs"`
	}
	if err := v.sidecarGet(ctx, "/jobs", &list); err != nil {
		out.Error = err.Error()
		return out
	}
	out.Reachable = true
	out.Total = len(list.Jobs)
	for _, j := range list.Jobs[:min(len(list.Jobs), v.o.MaxSearches)] {
		l := SearchLine{ID: j.ID, Task: path.Base(j.Spec.Task), Run: j.Spec.Run, State: j.State, Step: j.Step, Steps: j.Steps,
			BestPrompt: j.BestPrompt, TrainAcc: j.TrainAcc, DevAcc: j.DevAcc, Calls: j.Calls, CacheShare: j.CacheShare,
			SpentUSD: j.SpentUSD, Error: j.Error, Runner: j.Sidecar, Attempts: j.Attempts}
		var h struct {
			Points []CurvePoint `json:"points"`
		}
		if err := v.sidecarGet(ctx, "/jobs/"+url.PathEscape(j.ID)+"/history", &h); err != nil {
			l.CurveError = err.Error()
		}
		l.Curve = h.Points
		out.Searches = append(out.Searches, l)
	}
	return out
}

// sidecarGet decodes the JSON answer of GET p on the sidecar into dst.
func (v *View) sidecarGet(ctx context.Context, p string, dst any) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, v.o.Sidecar+p, nil)
	if err != nil {
		return fmt.Errorf("sidecar address: %w", err)
	}
	resp, err := v.o.Client.Do(req)
	if err != nil {
		return errUnreachable
	}
	defer resp.Body.Close()
	body, err := io.ReadAll(io.LimitReader(resp.Body, maxSidecarBody))
	if err != nil {
		return errUnreachable
	}
	if resp.StatusCode != http.StatusOK {
		var e struct {
			Error struct {
				Message string `json:"message"`
			} `json:"error"`
		}
		if json.Unmarshal(body, &e) == nil && e.Error.Message != "" {
			return fmt.Errorf("sidecar answered %d: %s", resp.StatusCode, e.Error.Message)
		}
		return fmt.Errorf("sidecar answered %d", resp.StatusCode)
	}
	if err := json.Unmarshal(body, dst); err != nil {
		return fmt.Errorf("sidecar answer to %s: %w", p, err)
	}
	return nil
}

// redactURL drops any user info from an address before it is shown.
func redactURL(s string) string {
	u, err := url.Parse(s)
	if err != nil {
		return "(unparsable address)"
	}
	u.User = nil
	return u.String()
}
