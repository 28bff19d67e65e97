package main

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"strings"
	"time"
)

// adminKeyEnv names the environment variable holding the admin key that
// the --proxy commands send; keys never go on the command line.
const adminKeyEnv = "STINT_ADMIN_KEY"

// adminCall sends one request to a proxy's admin endpoint and decodes the
// JSON answer into out. base is the proxy's address ("http://host:port").
func adminCall(ctx context.Context, method, base, path string, query url.Values, body, out any) error {
	key := os.Getenv(adminKeyEnv)
	if key == "" {
		return fmt.Errorf("set %s to an admin key (make one with `stint keys new --admin`)", adminKeyEnv)
	}
	u, err := url.Parse(strings.TrimRight(base, "/") + path)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return fmt.Errorf("--proxy %q: want the proxy's address, like http://127.0.0.1:8787", base)
	}
	u.RawQuery = query.Encode()
	var rd io.Reader
	if body != nil {
		b, err := json.Marshal(body)
		if err != nil {
			return err
		}
		rd = bytes.NewReader(b)
	}
	ctx, cancel := context.WithTimeout(ctx, 30*time.Second)
	defer cancel()
	req, err := http.NewRequestWithContext(ctx, method, u.String(), rd)
	if err != nil {
		return err
	}
	req.Header.Set("Authorization", "Bearer "+key)
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return fmt.Errorf("admin call: %w", err)
	}
	defer resp.Body.Close()
	raw, err := io.ReadAll(io.LimitReader(resp.Body, 64<<20))
	if err != nil {
		return fmt.Errorf("admin call: read answer: %w", err)
	}
	if resp.StatusCode != http.StatusOK {
		var e struct {
			Error struct {
				Message string `json:"message"`
			} `json:"error"`
		}
		if json.Unmarshal(raw, &e) == nil && e.Error.Message != "" {
			return fmt.Errorf("proxy answered %d: %s", resp.StatusCode, e.Error.Message)
		}
		return fmt.Errorf("proxy answered %d", resp.StatusCode)
	}
	if err := json.Unmarshal(raw, out); err != nil {
		return errors.Join(errors.New("admin call: the answer is not the expected JSON"), err)
	}
	return nil
}
