// Command probe is the health check of stint's container image, which has
// no shell and no HTTP client: it sends GET to one URL and exits 0 when the
// answer is 2xx, 1 when it is anything else or does not come in time, and
// 2 on bad usage. The image installs it as /usr/local/bin/stint-probe.
//
//	stint-probe [-timeout 3s] http://127.0.0.1:8787/readyz
package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"net/http"
	"os"
	"time"
)

func main() {
	timeout := flag.Duration("timeout", 3*time.Second, "how long to wait for the answer")
	flag.Usage = func() {
		fmt.Fprintln(flag.CommandLine.Output(), "usage: stint-probe [-timeout 3s] URL")
		flag.PrintDefaults()
	}
	flag.Parse()
	if flag.NArg() != 1 {
		flag.Usage()
		os.Exit(2)
	}
	ctx, cancel := context.WithTimeout(context.Background(), *timeout)
	defer cancel()
	if err := check(ctx, http.DefaultClient, flag.Arg(0)); err != nil {
		fmt.Fprintln(os.Stderr, "stint-probe:", err)
		os.Exit(1)
	}
}

// check sends GET url and returns nil for a 2xx answer. It reads at most
// 64 KiB of the body so the connection closes cleanly.
func check(ctx context.Context, client *http.Client, url string) error {
	req, err := http.NewRequestWithContext(ctx, http.MethodGet, url, nil)
	if err != nil {
		return fmt.Errorf("bad URL: %w", err)
	}
	resp, err := client.Do(req)
	if err != nil {
		return fmt.Errorf("GET %s: %w", url, err)
	}
	defer resp.Body.Close()
	_, _ = io.Copy(io.Discard, io.LimitReader(resp.Body, 64<<10))
	if resp.StatusCode < 200 || resp.StatusCode > 299 {
		return fmt.Errorf("GET %s: %s", url, resp.Status)
	}
	return nil
}
