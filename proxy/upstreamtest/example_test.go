package upstreamtest_test

import (
	"encoding/json"
	"fmt"
	"net/http"
	"strings"

	"github.com/stintlab/stint/proxy/upstreamtest"
)

func ExampleNew() {
	up := upstreamtest.New(upstreamtest.Options{Key: "up-key"})
	defer up.Close()

	body := `{"model":"quill-small","prompt":["The barge","Every hive hums"],"max_tokens":4,"temperature":0}`
	req, _ := http.NewRequest(http.MethodPost, up.URL()+"/completions", strings.NewReader(body))
	req.Header.Set("Authorization", "Bearer up-key")
	resp, err := http.DefaultClient.Do(req)
	if err != nil {
		fmt.Println(err)
		return
	}
	defer resp.Body.Close()
	var out struct {
		Choices []struct {
			Index int `json:"index"`
		} `json:"choices"`
		Usage struct {
			PromptTokens int `json:"prompt_tokens"`
		} `json:"usage"`
	}
	json.NewDecoder(resp.Body).Decode(&out)

	fmt.Println("status:", resp.StatusCode)
	fmt.Println("choices:", len(out.Choices), "prompt tokens:", out.Usage.PromptTokens)
	fmt.Println("calls:", up.Calls().Completions, "prompts:", up.Prompts())
	// Output:
	// status: 200
	// choices: 2 prompt tokens: 5
	// calls: 1 prompts: 2
}
