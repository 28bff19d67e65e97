package localmodel

import (
	"math"
	"runtime"
	"sync"

	"gonum.org/v1/gonum/blas"
	"gonum.org/v1/gonum/blas/blas32"
)

// Tile bounds for matmulT. gonum's Sgemm computes a call serially when it
// spans fewer than 4 blocks of 64×64 outputs, and then each output element
// is one full-length assembly dot product (f32.DotUnitary) whose summation
// order depends only on the length and the weight row's address. Keeping
// every call to at most 64 rows × 192 outputs keeps it on that path, so
// each element is summed in the same order whatever the batch size:
// batched and token-by-token prompt processing agree bit for bit. (Larger
// calls go parallel and split k into 64-wide blocks, which would change the
// rounding with the batch size.)
const (
	tileRows = 64
	tileOuts = 192
	// parallelMACs is the size above which tiles run on several cores.
	parallelMACs = 1 << 20
)

// matmulT computes out[i][j] = Σ_k x[i][k]·w[j][k] for n rows of x (each in
// wide) against outDim rows of w, writing n×outDim values to out.
//
// It uses gonum's Sgemm, tiled as described above: BenchmarkMatmul measured
// it 1.5–2× faster per core than the best hand-written Go loops (gonum's
// SSE dot product against scalar Go), and the tiling keeps results
// independent of the batch size. Big products spread their row tiles over
// GOMAXPROCS goroutines; every element is still computed by one dot product,
// so the result does not depend on the split.
func matmulT(out, x, w []float32, n, in, outDim int) {
	if n == 0 || outDim == 0 {
		return
	}
	rowTiles := (n + tileRows - 1) / tileRows
	workers := min(runtime.GOMAXPROCS(0), rowTiles)
	if workers <= 1 || n*in*outDim < parallelMACs {
		matmulTiles(out, x, w, 0, n, in, outDim)
		return
	}
	var wg sync.WaitGroup
	per := (rowTiles + workers - 1) / workers * tileRows
	for lo := 0; lo < n; lo += per {
		hi := min(n, lo+per)
		wg.Add(1)
		go func() {
			defer wg.Done()
			matmulTiles(out, x, w, lo, hi, in, outDim)
		}()
	}
	wg.Wait()
}

// matmulTiles computes rows [lo, hi) of matmulT, one serial Sgemm per tile.
func matmulTiles(out, x, w []float32, lo, hi, in, outDim int) {
	for i := lo; i < hi; i += tileRows {
		rows := min(tileRows, hi-i)
		a := blas32.General{Rows: rows, Cols: in, Stride: in, Data: x[i*in : (i+rows)*in]}
		for j := 0; j < outDim; j += tileOuts {
			cols := min(tileOuts, outDim-j)
			b := blas32.General{Rows: cols, Cols: in, Stride: in, Data: w[j*in : (j+cols)*in]}
			c := blas32.General{Rows: rows, Cols: cols, Stride: outDim, Data: out[i*outDim+j : (i+rows-1)*outDim+j+cols]}
			blas32.Gemm(blas.NoTrans, blas.Trans, 1, a, b, 0, c)
		}
	}
}

// dot is Σ a[k]·b[k] with two interleaved partial sums, for the short
// per-head vectors of attention (head_dim floats, too short for a call
// into gonum to pay).
func dot(a, b []float32) float32 {
	b = b[:len(a)]
	var s0, s1 float32
	k := 0
	for ; k+2 <= len(a); k += 2 {
		s0 += a[k] * b[k]
		s1 += a[k+1] * b[k+1]
	}
	if k < len(a) {
		s0 += a[k] * b[k]
	}
	return s0 + s1
}

// expf returns e^x in float32 arithmetic, within a few ulp of the exact
// value. Written by hand because math.Exp works in float64 and was the
// largest single cost of attention (one call per head, position and
// query); the standard library has no float32 version.
//
// Method: x = n·ln2 + r with |r| ≤ ln2/2 (ln2 split in a high part exact in
// float32 and a low correction), e^r from its Taylor series to r⁷/5040
// (truncation error below 2e-8 relative on that range), times 2ⁿ built
// from the exponent bits.
func expf(x float32) float32 {
	const (
		log2e = 1.44269504088896341
		ln2hi = 0.693145751953125 // 12 significant bits: n·ln2hi is exact
		ln2lo = 1.428606820309417e-06
	)
	switch {
	case x > 88.7228: // ln(MaxFloat32) ≈ 88.72284
		return float32(math.Inf(1))
	case x < -87.33: // below the smallest normal float32
		return 0
	case x != x: // NaN
		return x
	}
	t := x * log2e
	var n float32
	if t >= 0 {
		n = float32(int32(t + 0.5))
	} else {
		n = float32(int32(t - 0.5))
	}
	r := (x - n*ln2hi) - n*ln2lo
	p := 1 + r*(1+r*(1.0/2+r*(1.0/6+r*(1.0/24+r*(1.0/120+r*(1.0/720+r*(1.0/5040)))))))
	if n > 127 { // 2¹²⁸ is not a float32: scale in two steps
		return p * math.Float32frombits(uint32(int32(n)+126)<<23) * 2
	}
	return p * math.Float32frombits(uint32(int32(n)+127)<<23)
}
