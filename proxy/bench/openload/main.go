// Command openload sends POST requests at a fixed rate (an open loop: the
// schedule does not wait for answers) and prints the achieved rate and
// latency percentiles. Latency is measured from each request's scheduled
// send time, so time a request spent queued behind a slow one counts
// (closed-loop tools such as wrk hide it: coordinated omission). stint's
// benchmarks use it for the p99 of a cache hit at a set share of the
// measured peak rate.
//
//	openload -url http://127.0.0.1:8787/v1/completions -body FILE -rate 10000 -duration 10s
//
// Output, one line: rate=<achieved/s> sent=<n> errors=<n> p50_us=<n> p99_us=<n> max_us=<n>
package main

import (
	"bytes"
	"context"
	"flag"
	"fmt"
	"io"
	"net/http"
	"os"
	"slices"
	"sync"
	"time"
)

func main() {
	url := flag.String("url", "", "URL to POST to (required)")
	bodyFile := flag.String("body", "", "file holding the request body (required)")
	rate := flag.Float64("rate", 1000, "requests per second")
	duration := flag.Duration("duration", 10*time.Second, "how long to send")
	workers := flag.Int("workers", 256, "most requests in flight")
	flag.Parse()
	if *url == "" || *bodyFile == "" || *rate <= 0 {
		fmt.Fprintln(os.Stderr, "openload: -url, -body and a positive -rate are required")
		os.Exit(2)
	}
	body, err := os.ReadFile(*bodyFile)
	if err != nil {
		fmt.Fprintln(os.Stderr, "openload:", err)
		os.Exit(1)
	}
	fmt.Println(run(context.Background(), *url, body, *rate, *duration, *workers))
}

// result is what one run measured.
type result struct {
	sent, errors int
	elapsed      time.Duration
	latencies    []time.Duration
}

func (r result) String() string {
	slices.Sort(r.latencies)
	pct := func(p float64) int64 {
		if len(r.latencies) == 0 {
			return 0
		}
		return r.latencies[min(len(r.latencies)-1, int(p*float64(len(r.latencies))))].Microseconds()
	}
	return fmt.Sprintf("rate=%.0f sent=%d errors=%d p50_us=%d p99_us=%d max_us=%d",
		float64(r.sent)/r.elapsed.Seconds(), r.sent, r.errors, pct(0.50), pct(0.99), pct(1))
}

// run sends at rate for duration with at most workers requests in flight.
// A request whose slot comes while every worker is busy waits for one, and
// its latency still counts from its scheduled time.
func run(ctx context.Context, url string, body []byte, rate float64, duration time.Duration, workers int) result {
	tr := http.DefaultTransport.(*http.Transport).Clone()
	tr.MaxIdleConnsPerHost = workers
	client := &http.Client{Transport: tr, Timeout: 30 * time.Second}
	interval := time.Duration(float64(time.Second) / rate)
	slots := make(chan time.Time, workers)
	var (
		mu  sync.Mutex
		res result
		wg  sync.WaitGroup
	)
	for range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for due := range slots {
				ok := send(ctx, client, url, body)
				lat := time.Since(due)
				mu.Lock()
				res.sent++
				if !ok {
					res.errors++
				}
				res.latencies = append(res.latencies, lat)
				mu.Unlock()
			}
		}()
	}
	start := time.Now()
	for i := 0; ; i++ {
		due := start.Add(time.Duration(i) * interval)
		if due.Sub(start) >= duration {
			break
		}
		if d := time.Until(due); d > 0 {
			time.Sleep(d)
		}
		slots <- due
	}
	close(slots)
	wg.Wait()
	res.elapsed = time.Since(start)
	return res
}

func send(ctx context.Context, client *http.Client, url string, body []byte) bool {
	req, err := http.NewRequestWithContext(ctx, http.MethodPost, url, bytes.NewReader(body))
	if err != nil {
		return false
	}
	req.Header.Set("Content-Type", "application/json")
	resp, err := client.Do(req)
	if err != nil {
		return false
	}
	_, _ = io.Copy(io.Discard, resp.Body)
	resp.Body.Close()
	return resp.StatusCode == http.StatusOK
}
