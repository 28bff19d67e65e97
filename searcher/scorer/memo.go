package scorer

import (
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"maps"
	"slices"
	"sync"
)

// Answer is one answered call a Memo keeps: the texts' key (AnswerKey),
// the log-probabilities it returned and the call's figures.
type Answer struct {
	Key  string               `json:"key"`
	Top  []map[string]float64 `json:"top"`
	Call Call                 `json:"call"`
}

// AnswerKey identifies a call by the texts it scores.
func AnswerKey(texts []string) string {
	h := sha256.New()
	for _, t := range texts {
		h.Write(binary.LittleEndian.AppendUint64(nil, uint64(len(t))))
		h.Write([]byte(t))
	}
	return hex.EncodeToString(h.Sum(nil))
}

// Memo keeps the calls a Client answered and gives earlier answers back.
// A search that failed part way (a budget refusal, say) saves the answers
// it got since its last checkpoint; resumed from that checkpoint, its
// client is given them (Give) and answers the same calls with them, in
// order and at the charges they had, instead of asking again. The resumed
// search then makes each call of the search once, as a replay of its run
// does, so the two agree byte for byte, spend included.
//
// The zero value is not usable; NewMemo makes one. A Memo is safe for
// concurrent use.
type Memo struct {
	// mu guards given and kept.
	mu sync.Mutex
	// given are answers to hand out, first in first out per key.
	given map[string][]Answer
	// kept are the calls answered since the last Mark, in the order they
	// were answered, given ones included.
	kept []Answer
}

// NewMemo returns an empty Memo.
func NewMemo() *Memo { return &Memo{given: map[string][]Answer{}} }

// Give queues answers to be handed out, in order, for calls of their keys.
func (m *Memo) Give(as []Answer) {
	m.mu.Lock()
	defer m.mu.Unlock()
	for _, a := range as {
		m.given[a.Key] = append(m.given[a.Key], a)
	}
}

// Mark forgets the answers kept so far: a checkpoint now holds their effect.
func (m *Memo) Mark() {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.kept = nil
}

// Answers returns what a checkpoint taken at the last Mark must carry to
// resume without asking twice: the calls answered since, in order, then
// the given answers not handed out yet (by key). Per key, that is the
// order the search asks for them in.
func (m *Memo) Answers() []Answer {
	m.mu.Lock()
	defer m.mu.Unlock()
	out := append([]Answer(nil), m.kept...)
	for _, k := range slices.Sorted(maps.Keys(m.given)) {
		out = append(out, m.given[k]...)
	}
	return out
}

// take hands out the next given answer for key, if there is one.
func (m *Memo) take(key string) (Answer, bool) {
	m.mu.Lock()
	defer m.mu.Unlock()
	q := m.given[key]
	if len(q) == 0 {
		return Answer{}, false
	}
	a := q[0]
	if len(q) == 1 {
		delete(m.given, key)
	} else {
		m.given[key] = q[1:]
	}
	m.kept = append(m.kept, a)
	return a, true
}

// keep notes an answered call.
func (m *Memo) keep(a Answer) {
	m.mu.Lock()
	defer m.mu.Unlock()
	m.kept = append(m.kept, a)
}
