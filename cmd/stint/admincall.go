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
)

// Environment variables holding the keys the --proxy commands send; keys
// never go on the command line.
const (
	adminKeyEnv = "STINT_ADMIN_KEY" // an admin key: stint statement and stint budget
	teamKeyEnv  = "STINT_KEY"       // a team's client key: stint runs
)

// proxyRequest sends one request to a running proxy with the key from
// keyEnv and returns the response when it is a 200; any other status is
// an error carrying the proxy's message. The caller closes the body.
func proxyRequest(ctx context.Context, keyEnv, method, base, path string, query url.Values, body io.Reader, contentType string) (*http.Response, error) {
	key := os.Getenv(keyEnv)
	if key == "" {
		return nil, fmt.Errorf("set %s to the key to send", keyEnv)
	}
	u, err := url.Parse(strings.TrimRight(base, "/") + path)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return nil, fmt.Errorf("--proxy %q: want the proxy's address, like http://127.0.0.1:8787", base)
	}
	u.RawQuery = query.Encode()
	req, err := http.NewRequestWithContext(ctx, method, u.String(), body)
	if err != nil {
		return nil, err
	}
	req.Header.Set("Authorization", "Bearer "+key)
	if contentType != "" {
		req.Header.Set("Content-Type", contentType)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		return nil, fmt.Errorf("call the proxy: %w", err)
	}
	if resp.StatusCode == http.StatusOK {
		return resp, nil
	}
	defer resp.Body.Close()
	raw, _ := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
	var e struct {
		Error struct {
			Message string `json:"message"`
		} `json:"error"`
	}
	if json.Unmarshal(raw, &e) == nil && e.Error.Message != "" {
		return nil, fmt.Errorf("proxy answered %d: %s", resp.StatusCode, e.Error.Message)
	}
	return nil, fmt.Errorf("proxy answered %d", resp.StatusCode)
}

// jsonCall sends body (nil for none) as JSON and decodes the answer into
// out.
func jsonCall(ctx context.Context, keyEnv, method, base, path string, query url.Values, body, out any) error {
	var rd io.Reader
	ct := ""
	if body != nil {
		b, err := json.Marshal(body)
		if err != nil {
			return err
		}
		rd, ct = bytes.NewReader(b), "application/json"
	}
	resp, err := proxyRequest(ctx, keyEnv, method, base, path, query, rd, ct)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	return decodeJSON(resp.Body, out)
}

// decodeJSON reads a proxy's JSON answer into out.
func decodeJSON(r io.Reader, out any) error {
	raw, err := io.ReadAll(io.LimitReader(r, 64<<20))
	if err != nil {
		return fmt.Errorf("read the proxy's answer: %w", err)
	}
	if err := json.Unmarshal(raw, out); err != nil {
		return errors.Join(errors.New("the proxy's answer is not the expected JSON"), err)
	}
	return nil
}

// adminCall is jsonCall with the admin key.
func adminCall(ctx context.Context, method, base, path string, query url.Values, body, out any) error {
	return jsonCall(ctx, adminKeyEnv, method, base, path, query, body, out)
}
