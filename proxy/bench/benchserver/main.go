// Command benchserver is the baseline for stint's throughput benchmark: a
// bare Go HTTP server that reads each request body and answers with fixed
// bytes from memory — the ceiling for a Go server on this machine. With
// --body it answers those bytes; without, it answers a small valid
// completions response, so it can also stand in as a fast upstream.
package main

import (
	"flag"
	"fmt"
	"io"
	"log"
	"net"
	"net/http"
	"os"
	"strconv"
)

const defaultAnswer = `{"id":"cmpl-bench","object":"text_completion","created":1780000000,"model":"bench-model","choices":[{"text":" the barge drifted past the old mill and the keepers counted the hives","index":0,"logprobs":null,"finish_reason":"length"}],"usage":{"prompt_tokens":9,"completion_tokens":16,"total_tokens":25}}`

func main() {
	listen := flag.String("listen", "127.0.0.1:0", "address to listen on")
	bodyFile := flag.String("body", "", "file whose bytes every answer carries (default: a small completions answer)")
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
	log.Fatal(http.Serve(ln, h))
}
