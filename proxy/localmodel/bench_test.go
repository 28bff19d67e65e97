package localmodel

import (
	"context"
	"encoding/json"
	"fmt"
	"math/rand/v2"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas32"

	"github.com/stintlab/stint/proxy/wire"
)

// matmulShapes are this model's matmuls: (rows, in, out).
var matmulShapes = [][3]int{{1, 64, 172}, {64, 64, 172}, {256, 172, 64}, {256, 64, 512}}

func randMatrix(rng *rand.Rand, n int) []float32 {
	x := make([]float32, n)
	for i := range x {
		x[i] = rng.Float32()*2 - 1
	}
	return x
}

// handMatmulT is the best hand-written Go kernel tried: four rows at a time
// so each weight row is loaded once per four outputs, two partial sums per
// dot product. Kept here to measure against the gonum kernel in use.
func handMatmulT(out, x, w []float32, n, in, outDim int) {
	i := 0
	for ; i+4 <= n; i += 4 {
		x0, x1 := x[i*in:(i+1)*in], x[(i+1)*in:(i+2)*in]
		x2, x3 := x[(i+2)*in:(i+3)*in], x[(i+3)*in:(i+4)*in]
		for j := 0; j < outDim; j++ {
			out[i*outDim+j], out[(i+1)*outDim+j], out[(i+2)*outDim+j], out[(i+3)*outDim+j] = dot4(w[j*in:(j+1)*in], x0, x1, x2, x3)
		}
	}
	for ; i < n; i++ {
		for j := 0; j < outDim; j++ {
			out[i*outDim+j] = dot(w[j*in:(j+1)*in], x[i*in:(i+1)*in])
		}
	}
}

func dot4(w, x0, x1, x2, x3 []float32) (float32, float32, float32, float32) {
	n := len(w)
	x0, x1, x2, x3 = x0[:n], x1[:n], x2[:n], x3[:n]
	var a0, a1, b0, b1, c0, c1, d0, d1 float32
	k := 0
	for ; k+2 <= n; k += 2 {
		w0, w1 := w[k], w[k+1]
		a0 += w0 * x0[k]
		a1 += w1 * x0[k+1]
		b0 += w0 * x1[k]
		b1 += w1 * x1[k+1]
		c0 += w0 * x2[k]
		c1 += w1 * x2[k+1]
		d0 += w0 * x3[k]
		d1 += w1 * x3[k+1]
	}
	if k < n {
		a0 += w[k] * x0[k]
		b0 += w[k] * x1[k]
		c0 += w[k] * x2[k]
		d0 += w[k] * x3[k]
	}
	return a0 + a1, b0 + b1, c0 + c1, d0 + d1
}

// gonumMatmulT is one untiled gonum Sgemm call (C = X·Wᵀ); it may go
// parallel and split k, so it is not batch-size invariant.
func gonumMatmulT(out, x, w []float32, n, in, outDim int) {
	a := blas32.General{Rows: n, Cols: in, Stride: in, Data: x}
	b := blas32.General{Rows: outDim, Cols: in, Stride: in, Data: w}
	c := blas32.General{Rows: n, Cols: outDim, Stride: outDim, Data: out}
	blas32.Gemm(blas.NoTrans, blas.Trans, 1, a, b, 0, c)
}

// gonumDotMatmulT keeps this package's loop order but takes each dot
// product from gonum (its assembly Sdot).
func gonumDotMatmulT(out, x, w []float32, n, in, outDim int) {
	for i := 0; i < n; i++ {
		xv := blas32.Vector{N: in, Inc: 1, Data: x[i*in : (i+1)*in]}
		for j := 0; j < outDim; j++ {
			out[i*outDim+j] = blas32.Dot(xv, blas32.Vector{N: in, Inc: 1, Data: w[j*in : (j+1)*in]})
		}
	}
}

// BenchmarkMatmul compares the hand-written kernel with gonum on this
// model's shapes and reports the FLOP rate (2 FLOPs per multiply-add).
func BenchmarkMatmul(b *testing.B) {
	kernels := []struct {
		name string
		f    func(out, x, w []float32, n, in, outDim int)
	}{{"hand", handMatmulT}, {"gonum-tiled(used)", matmulT}, {"gonum-sgemm", gonumMatmulT}, {"gonum-sdot", gonumDotMatmulT}}
	rng := rand.New(rand.NewPCG(1, 1))
	for _, s := range matmulShapes {
		n, in, od := s[0], s[1], s[2]
		x, w, out := randMatrix(rng, n*in), randMatrix(rng, od*in), make([]float32, n*od)
		for _, k := range kernels {
			b.Run(fmt.Sprintf("%s/%dx%dx%d", k.name, n, in, od), func(b *testing.B) {
				for b.Loop() {
					k.f(out, x, w, n, in, od)
				}
				b.ReportMetric(float64(2*n*in*od)*float64(b.N)/b.Elapsed().Seconds()/1e9, "GFLOP/s")
			})
		}
	}
}

// flopsPerToken counts the multiply-adds of one token at position pos
// (×2 FLOPs): the weight matmuls, the output head, and attention.
func flopsPerToken(c Config, pos int) float64 {
	kv := c.kvDim()
	perLayer := c.Dim*c.Dim*2 + c.Dim*kv*2 + 3*c.Dim*c.HiddenDim + 2*(pos+1)*c.Dim
	return 2 * float64(c.Layers*perLayer+c.Dim*c.VocabSize)
}

// benchPrompt is a story-like prompt of about n tokens.
func benchPrompt(m *Model, n int) []int {
	words := strings.Fields("Once upon a time there was a little girl named Lily who loved to play in the park with her friend Tim and a big red ball")
	toks := []int{m.tok.BOS()}
	for i := 0; len(toks) < n; i++ {
		toks = append(toks, m.tok.Encode(words[i%len(words)])...)
	}
	return toks[:n]
}

// BenchmarkPrompt measures prompt processing (256 tokens, no logits except
// the last) batched and token by token in the same run, and reports their
// ratio, the FLOP rate of the kernel on the model's main shape and the
// compute ceiling it implies.
func BenchmarkPrompt(b *testing.B) {
	m := loadModel(b)
	toks := benchPrompt(m, 256)
	ctx := context.Background()
	var ws workspace
	batched := func() {
		s := m.newSequence()
		seqs := make([]*sequence, len(toks))
		for i := range seqs {
			seqs[i] = s
		}
		_, _, _ = m.forward(ctx, &ws, seqs, toks, []int{len(toks) - 1})
	}
	single := func() {
		s := m.newSequence()
		for i, t := range toks {
			var rows []int
			if i == len(toks)-1 {
				rows = []int{0}
			}
			_, _, _ = m.forward(ctx, &ws, []*sequence{s}, []int{t}, rows)
		}
	}
	var tb, ts time.Duration
	for b.Loop() {
		t0 := time.Now()
		batched()
		t1 := time.Now()
		single()
		tb += t1.Sub(t0)
		ts += time.Since(t1)
	}
	n := float64(len(toks) * b.N)
	b.ReportMetric(n/tb.Seconds(), "batched_tok/s")
	b.ReportMetric(n/ts.Seconds(), "single_tok/s")
	b.ReportMetric(ts.Seconds()/tb.Seconds(), "batched/single")

	// FLOP rate of the kernel on the model's largest batched matmul shape,
	// measured now, and the ceiling it gives for prompt processing.
	rng := rand.New(rand.NewPCG(2, 2))
	rows, in, od := 256, 64, 172
	x, w, out := randMatrix(rng, rows*in), randMatrix(rng, od*in), make([]float32, rows*od)
	reps := 200
	t0 := time.Now()
	for range reps {
		matmulT(out, x, w, rows, in, od)
	}
	rate := float64(2*rows*in*od*reps) / time.Since(t0).Seconds()
	var flops float64
	for p := range toks {
		flops += flopsPerToken(m.cfg, p)
	}
	ceiling := float64(len(toks)) / (flops / rate)
	b.ReportMetric(rate/1e9, "kernel_GFLOP/s")
	b.ReportMetric(ceiling, "ceiling_tok/s")
	b.ReportMetric(n/tb.Seconds()/ceiling, "of_ceiling")
}

// BenchmarkGenerate measures greedy generation of 128 tokens after BOS in
// one request, against the ceiling at the same positions.
func BenchmarkGenerate(b *testing.B) {
	m := loadModel(b)
	eng := &engine{m: m}
	gp := &genParams{maxTokens: 128, temperature: 0, topP: 1, logprobs: -1}
	for b.Loop() {
		if _, _, err := eng.run(context.Background(), [][]int{{1}}, 1, gp, nil, nil); err != nil {
			b.Fatal(err)
		}
	}
	b.ReportMetric(float64(128*b.N)/b.Elapsed().Seconds(), "gen_tok/s")
}

// BenchmarkServe sends requests through the HTTP handler (in process, no
// network) that share a 200-token template and differ in a short input, as
// a prompt search does, single and 16 at once, with and without the
// prefix cache. It reports prompt and generated tokens per second.
func BenchmarkServe(b *testing.B) {
	m := loadModel(b)
	template := strings.Repeat("Lily and Tim played with a big red ball in the park. ", 14)
	for _, cache := range []int{-1, 0} {
		for _, conc := range []int{1, 16} {
			name := fmt.Sprintf("cache=%v/concurrent=%d", cache == 0, conc)
			b.Run(name, func(b *testing.B) {
				h := NewHandler(m, HandlerOptions{PrefixCacheTokens: cache})
				var mu sync.Mutex
				var promptToks, genToks int
				var next int
				b.SetParallelism(1)
				run := func(i int) {
					body := fmt.Sprintf(`{"prompt": %q, "max_tokens": 16, "temperature": 0}`, template+fmt.Sprintf("Story %d:", i))
					rec := httptest.NewRecorder()
					h.ServeHTTP(rec, httptest.NewRequest(http.MethodPost, "/v1/completions", strings.NewReader(body)))
					var r wire.CompletionResponse
					if rec.Code != 200 || jsonUnmarshal(rec.Body.Bytes(), &r) != nil {
						b.Errorf("status %d", rec.Code)
						return
					}
					mu.Lock()
					promptToks += r.Usage.PromptTokens
					genToks += r.Usage.CompletionTokens
					mu.Unlock()
				}
				for b.Loop() {
					var wg sync.WaitGroup
					for range conc {
						next++
						wg.Add(1)
						go func(i int) { defer wg.Done(); run(i) }(next)
					}
					wg.Wait()
				}
				s := b.Elapsed().Seconds()
				b.ReportMetric(float64(promptToks)/s, "prompt_tok/s")
				b.ReportMetric(float64(genToks)/s, "gen_tok/s")
			})
		}
	}
}

func jsonUnmarshal(b []byte, v any) error { return json.Unmarshal(b, v) }
