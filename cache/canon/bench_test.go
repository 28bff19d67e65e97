package canon

import (
	"testing"

	"github.com/gowebpki/jcs"
)

// typicalBody is a chat completions request body of about 330 bytes.
var typicalBody = []byte(`{"model":"tern-7","messages":[{"role":"system","content":"You are a careful grader of short product descriptions."},` +
	`{"role":"user","content":"Rate this description from 1 to 10: 'A copper kettle that whistles in two tones when the water boils.'"}],` +
	`"temperature":0,"max_tokens":64,"top_p":1,"n":1,"logprobs":true,"top_logprobs":5,"seed":7,"stop":["\n\n"]}`)

func BenchmarkTransform(b *testing.B) {
	b.SetBytes(int64(len(typicalBody)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := Transform(typicalBody); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkCanonicalizerAppend(b *testing.B) {
	b.SetBytes(int64(len(typicalBody)))
	b.ReportAllocs()
	var c Canonicalizer
	buf := make([]byte, 0, 1024)
	for b.Loop() {
		var err error
		if buf, err = c.Append(buf[:0], typicalBody); err != nil {
			b.Fatal(err)
		}
	}
}

func BenchmarkMarshalDecoded(b *testing.B) {
	v := decode(b, string(typicalBody))
	b.ReportAllocs()
	var c Canonicalizer
	buf := make([]byte, 0, 1024)
	for b.Loop() {
		var err error
		if buf, err = c.AppendValue(buf[:0], v); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkJCSLibrary is github.com/gowebpki/jcs on the same body, the
// reason this package canonicalizes by hand.
func BenchmarkJCSLibrary(b *testing.B) {
	b.SetBytes(int64(len(typicalBody)))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := jcs.Transform(typicalBody); err != nil {
			b.Fatal(err)
		}
	}
}
