// Command benchserver is the baseline for stint's throughput benchmarks: a
// bare Go HTTP server that reads each request body and answers with fixed
// bytes from memory — the ceiling for a Go server on this machine. With
// --body it answers those bytes; without, it answers a small valid
// completions response, so it can also stand in as a fast upstream.
//
// With --forward URL it is instead the bare forwarding hop: each request's
// body is posted to URL plus the request's path with net/http's client and
// the answer copied back, no parsing, no cache — what any Go proxy in front
// of that upstream pays at least.
package main

import (
	"bytes"
	"flag"
	"fmt"
	"io"
	"log"
	"net"
	"net/http"
	"os"
	"strconv"
	"strings"
)

const defaultAnswer = `{"id":"cmpl-bench","object":"text_completion","created":1780000000,"model":"bench-model","choices":[{"text":" the barge drifted past the old mill and the keepers counted the hives","index":0,"logprobs":null,"finish_reason":"length"}],"usage":{"prompt_tokens":9,"completion_tokens":16,"total_tokens":25}}`

func main() {
	listen := flag.String("listen", "127.0.0.1:0", "address to listen on")
	bodyFile := flag.String("body", "", "file whose bytes every answer carries (default: a small completions answer)")
	forward := flag.String("forward", "", "forward every request to this base URL instead of answering it")
	flag.Parse()
	answer := []byte(defaultAnswer)
	if *bodyFile != "" {
		b, err := os.ReadFile(*bodyFile)
		if err != nil {
			log.Fatal(err)
		}
		answer = b
	}
	length := strconv.Itoa(len(answer))
	ln, err := net.Listen("tcp", *listen)
	if err != nil {
		log.Fatal(err)
	}
	fmt.Println(ln.Addr().String())
	h := http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		_, _ = io.Copy(io.Discard, r.Body)
		w.Header().Set("Content-Type", "application/json")
		w.Header().Set("Content-Length", length)
		_, _ = w.Write(answer)
	})
	if *forward != "" {
		h = forwarder(strings.TrimSuffix(*forward, "/"))
	}
	log.Fatal(http.Serve(ln, h))
}

// forwarder posts each request's body to base+path and copies the answer.
func forwarder(base string) http.HandlerFunc {
	tr := http.DefaultTransport.(*http.Transport).Clone()
	tr.MaxIdleConnsPerHost = 256
	client := &http.Client{Transport: tr}
	return func(w http.ResponseWriter, r *http.Request) {
		body, err := io.ReadAll(r.Body)
		if err != nil {
			http.Error(w, err.Error(), http.StatusBadRequest)
			return
		}
		req, err := http.NewRequestWithContext(r.Context(), r.Method, base+r.URL.Path, bytes.NewReader(body))
		if err != nil {
			http.Error(w, err.Error(), http.StatusInternalServerError)
			return
		}
		req.Header.Set("Content-Type", r.Header.Get("Content-Type"))
		resp, err := client.Do(req)
		if err != nil {
			http.Error(w, err.Error(), http.StatusBadGateway)
			return
		}
		defer resp.Body.Close()
		out, err := io.ReadAll(resp.Body)
		if err != nil {
			http.Error(w, err.Error(), http.StatusBadGateway)
			return
		}
		w.Header().Set("Content-Type", resp.Header.Get("Content-Type"))
		w.Header().Set("Content-Length", strconv.Itoa(len(out)))
		w.WriteHeader(resp.StatusCode)
		_, _ = w.Write(out)
	}
}
