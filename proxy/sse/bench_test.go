package sse_test

import (
	"bytes"
	"io"
	"strings"
	"testing"

	"github.com/stintlab/stint/proxy/sse"
)

// benchStream is a streamed answer of 200 chunks shaped like the wire
// format's.
func benchStream() []byte {
	chunk := `{"id":"cmpl-1","object":"text_completion","created":1,"model":"quill-small","choices":[{"text":" hive","index":0,"logprobs":null,"finish_reason":null}]}`
	return []byte(strings.Repeat("data: "+chunk+"\n\n", 200) + "data: [DONE]\n\n")
}

func BenchmarkReader(b *testing.B) {
	in := benchStream()
	b.SetBytes(int64(len(in)))
	for b.Loop() {
		r := sse.NewReader(bytes.NewReader(in))
		for {
			if _, err := r.Next(); err != nil {
				if err != io.EOF {
					b.Fatal(err)
				}
				break
			}
		}
	}
}

func BenchmarkWriter(b *testing.B) {
	data := []byte(`{"id":"cmpl-1","object":"text_completion","created":1,"model":"quill-small","choices":[{"text":" hive","index":0,"logprobs":null,"finish_reason":null}]}`)
	w := sse.NewWriter(io.Discard)
	b.SetBytes(int64(len(data)))
	for b.Loop() {
		if err := w.WriteData(data); err != nil {
			b.Fatal(err)
		}
	}
}
