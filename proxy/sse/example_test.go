package sse_test

import (
	"bytes"
	"fmt"
	"strings"

	"github.com/stintlab/stint/proxy/sse"
)

func ExampleReader() {
	stream := ": keep-alive\n" +
		"data: {\"text\":\" hive\"}\n\n" +
		"data: line one\r\ndata: line two\r\n\r\n" +
		"data: [DONE]\n\n"
	r := sse.NewReader(strings.NewReader(stream))
	for {
		ev, err := r.Next()
		if err != nil {
			fmt.Println("error:", err)
			return
		}
		if ev.IsDone() {
			fmt.Println("done")
			return
		}
		fmt.Printf("%q\n", ev.Data)
	}
	// Output:
	// "{\"text\":\" hive\"}"
	// "line one\nline two"
	// done
}

func ExampleWriter() {
	var buf bytes.Buffer
	w := sse.NewWriter(&buf)
	w.WriteData([]byte(`{"text":" barge"}`))
	w.WriteDone()
	fmt.Print(buf.String())
	// Output:
	// data: {"text":" barge"}
	//
	// data: [DONE]
}
