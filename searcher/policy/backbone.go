package policy

import "context"

// Backbone is the frozen language model under the policy.
//
// Hidden returns the last position's hidden state (the row that the output
// head turns into next-token logits) after the backbone's own start context
// followed by prompt; prompt may be empty (the start state). The returned
// slice has the head's column count, and neither side modifies it afterwards
// (an implementation may return the same slice to repeated calls).
//
// OutputHead returns the output head as a rows × cols row-major matrix
// (rows = vocabulary size, cols = hidden size): logits = head · hidden. It
// must return the same values every time; the policy copies what it needs.
type Backbone interface {
	Hidden(ctx context.Context, prompt []int) ([]float32, error)
	OutputHead() (rows, cols int, data []float32)
}
