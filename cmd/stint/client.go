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

	"github.com/spf13/pflag"
)

// Environment variables holding the keys client commands send when --key
// is not given; keys never need to go on the command line.
const (
	teamKeyEnv  = "STINT_KEY"       // a team's client key
	adminKeyEnv = "STINT_ADMIN_KEY" // an admin key (stint statement, stint budget)
)

// defaultProxy is where every client command finds the proxy unless told:
// stint serve's default listen address.
const defaultProxy = "http://127.0.0.1:8787"

// proxyFlags are --proxy and --key, which every command that talks to a
// running proxy takes in the same form.
type proxyFlags struct {
	proxy string
	key   string
	// admin: the command needs an admin key (STINT_ADMIN_KEY before
	// STINT_KEY).
	admin bool
}

// register adds --proxy and --key to fl.
func (f *proxyFlags) register(fl *pflag.FlagSet) {
	fl.StringVar(&f.proxy, "proxy", defaultProxy, "the running proxy's base URL, with or without /v1")
	keyHelp, keyDefault := "a team's client key; a proxy run without a config needs none", "$"+teamKeyEnv
	if f.admin {
		keyHelp, keyDefault = "an admin key; a proxy run without a config needs none", "$"+adminKeyEnv+", else $"+teamKeyEnv
	}
	fl.StringVar(&f.key, "key", "", keyHelp)
	describeFlag(fl, "proxy", "URL", "")
	describeFlag(fl, "key", "KEY", keyDefault)
}

// keyOf is the key to send: --key, else the environment; "" for none.
func (f *proxyFlags) keyOf(getenv func(string) string) string {
	if f.key != "" {
		return f.key
	}
	if f.admin {
		if k := getenv(adminKeyEnv); k != "" {
			return k
		}
	}
	return getenv(teamKeyEnv)
}

// client checks --proxy and returns a client for the proxy.
func (f *proxyFlags) client() (*proxyClient, error) {
	root, err := proxyRoot(f.proxy)
	if err != nil {
		return nil, err
	}
	return &proxyClient{root: root, key: f.keyOf(os.Getenv), admin: f.admin}, nil
}

// apiBase is the proxy's wire-format base URL, root + "/v1", as the
// scorer and client libraries take it.
func (f *proxyFlags) apiBase() (string, error) {
	root, err := proxyRoot(f.proxy)
	if err != nil {
		return "", err
	}
	return root + "/v1", nil
}

// proxyRoot reads a --proxy value: the proxy's base URL, with or without
// the wire format's /v1, and with any path prefix a reverse proxy puts in
// front of it. It returns the URL without /v1 or a trailing slash, or an
// error that says exactly what to change.
func proxyRoot(s string) (string, error) {
	s = strings.TrimSpace(s)
	example := defaultProxy
	if !strings.Contains(s, "://") {
		return "", fmt.Errorf("--proxy %q: give the scheme too, like http://%s", s, strings.TrimLeft(s, "/"))
	}
	u, err := url.Parse(s)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return "", fmt.Errorf("--proxy %q: want the proxy's base URL, like %s", s, example)
	}
	if u.RawQuery != "" || u.Fragment != "" || u.User != nil {
		return "", fmt.Errorf("--proxy %q: give only scheme, host and port (and a path prefix, if any), like %s", s, example)
	}
	path := strings.TrimRight(u.Path, "/")
	for _, endpoint := range []string{"/v1/completions", "/v1/chat/completions", "/v1/models", "/stint/runs", "/stint/admin", "/healthz", "/ui"} {
		if before, ok := strings.CutSuffix(path, endpoint); ok {
			return "", fmt.Errorf("--proxy %q names an endpoint: give the proxy's base URL, %s://%s%s", s, u.Scheme, u.Host, before)
		}
	}
	path = strings.TrimSuffix(path, "/v1")
	return u.Scheme + "://" + u.Host + path, nil
}

// proxyClient talks to a running proxy.
type proxyClient struct {
	root  string // base URL without /v1
	key   string // "" sends none
	admin bool
}

// do sends one request and returns the response when it is a 200; any
// other status is a *proxyError. The caller closes the body.
func (c *proxyClient) do(ctx context.Context, method, path string, query url.Values, body io.Reader, contentType string) (*http.Response, error) {
	u := c.root + path
	if len(query) > 0 {
		u += "?" + query.Encode()
	}
	req, err := http.NewRequestWithContext(ctx, method, u, body)
	if err != nil {
		return nil, err
	}
	if c.key != "" {
		req.Header.Set("Authorization", "Bearer "+c.key)
	}
	if contentType != "" {
		req.Header.Set("Content-Type", contentType)
	}
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		var ue *url.Error
		if errors.As(err, &ue) {
			err = ue.Err
		}
		return nil, fmt.Errorf("cannot reach the proxy at %s (%v): is stint serve running there? --proxy sets the address", c.root, err)
	}
	if resp.StatusCode == http.StatusOK {
		return resp, nil
	}
	defer resp.Body.Close()
	raw, _ := io.ReadAll(io.LimitReader(resp.Body, 1<<20))
	pe := &proxyError{Status: resp.StatusCode, Path: path, Root: c.root, Admin: c.admin, SentKey: c.key != ""}
	var e struct {
		Error struct {
			Message string `json:"message"`
			Code    string `json:"code"`
		} `json:"error"`
	}
	if json.Unmarshal(raw, &e) == nil {
		pe.Code, pe.Message = e.Error.Code, e.Error.Message
	}
	return nil, pe
}

// json sends body (nil for none) as JSON and decodes the answer into out.
func (c *proxyClient) json(ctx context.Context, method, path string, query url.Values, body, out any) error {
	var rd io.Reader
	ct := ""
	if body != nil {
		b, err := json.Marshal(body)
		if err != nil {
			return err
		}
		rd, ct = bytes.NewReader(b), "application/json"
	}
	resp, err := c.do(ctx, method, path, query, rd, ct)
	if err != nil {
		return err
	}
	defer resp.Body.Close()
	return decodeJSON(resp.Body, out)
}

// check asks the proxy's wire format (GET /v1/models) whether --proxy and
// --key are right, so a search started with a wrong path or key stops at
// once with what to change, not with a bare 404 or 401 from its first
// scoring call. Only a 404 or a 401 fails it: any other answer (the models
// list itself may fail upstream), or none (the search reports an
// unreachable proxy itself, after checking its forecast), passes.
func (c *proxyClient) check(ctx context.Context) error {
	resp, err := c.do(ctx, http.MethodGet, "/v1/models", nil, nil, "")
	if err != nil {
		var pe *proxyError
		if errors.As(err, &pe) && (pe.Status == http.StatusNotFound || pe.Status == http.StatusUnauthorized) {
			return err
		}
		return nil
	}
	resp.Body.Close()
	return nil
}

// proxyError is a proxy's answer other than 200, said in the command's
// own terms: a key to give, a --proxy to correct, or the proxy's message.
type proxyError struct {
	Status        int
	Code, Message string // from the wire error body, when there is one
	Path, Root    string
	Admin         bool // the command sends an admin key
	SentKey       bool // a key was sent
}

func (e *proxyError) Error() string {
	keyHow := "give --key KEY or set " + teamKeyEnv + " to your team's client key"
	if e.Admin {
		keyHow = "give --key KEY or set " + adminKeyEnv + " to an admin key (make one with stint keys new --admin)"
	}
	switch {
	case e.Status == http.StatusUnauthorized && !e.SentKey:
		return "the proxy at " + e.Root + " wants a key (401): " + keyHow
	case e.Status == http.StatusUnauthorized:
		return "the proxy at " + e.Root + " refused the key (401: " + e.Message + "): " + keyHow
	case e.Code == "admin_off":
		return "the proxy at " + e.Root + " has no admin keys, so its admin endpoints are off: list a key under admin.keys in its config (stint keys new --admin)"
	case e.Code == "spend_off":
		return "the proxy at " + e.Root + " records no spend: its config prices no model, and without prices nothing is recorded (see prices: in stint config example)"
	case e.Status == http.StatusNotFound && (e.Code == "unknown_url" || e.Code == ""):
		return fmt.Sprintf("%s has no %s (404): --proxy must be a stint proxy's base URL, like %s", e.Root, e.Path, defaultProxy)
	case e.Message != "":
		return fmt.Sprintf("the proxy answered %d: %s", e.Status, e.Message)
	}
	return fmt.Sprintf("the proxy answered %d %s", e.Status, http.StatusText(e.Status))
}

// decodeJSON reads a proxy's JSON answer into out.
func decodeJSON(r io.Reader, out any) error {
	raw, err := io.ReadAll(io.LimitReader(r, 64<<20))
	if err != nil {
		return fmt.Errorf("read the proxy's answer: %w", err)
	}
	if err := json.Unmarshal(raw, out); err != nil {
		return errors.New("the proxy's answer is not the JSON this command expects: is --proxy a stint proxy of the same version?")
	}
	return nil
}

// printJSON writes v as indented JSON, the --json form of a command's
// output.
func printJSON(out io.Writer, v any) error {
	enc := json.NewEncoder(out)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}
