package policy_test

import (
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"

	"github.com/stintlab/stint/searcher/policy"
)

func matchReward(p []int) float64 {
	n := 0
	for i, a := range p {
		if a == (3*i+1)%16 {
			n++
		}
	}
	return 2 * float64(n)
}

// run does steps rounds of Sample → Update and returns every sample and
// Stats, in order.
func run(t *testing.T, tr *policy.Trainer, steps int) ([][][]int, []policy.Stats) {
	t.Helper()
	ctx := context.Background()
	var samples [][][]int
	var stats []policy.Stats
	for range steps {
		p, err := tr.Sample(ctx, 6)
		require.NoError(t, err)
		rs := make([]float64, len(p))
		for i := range p {
			rs[i] = matchReward(p[i])
		}
		st, err := tr.Update(ctx, p, rs)
		require.NoError(t, err)
		samples, stats = append(samples, p), append(stats, st)
	}
	return samples, stats
}

func save(t *testing.T, tr *policy.Trainer) []byte {
	t.Helper()
	var buf bytes.Buffer
	require.NoError(t, tr.Save(&buf))
	return buf.Bytes()
}

// TestResume: a trainer restored from a checkpoint continues with exactly
// the samples, statistics and final state of one that never stopped.
func TestResume(t *testing.T) {
	b := newPosBackbone(16, 3, 5)
	cfg := policy.Config{PromptLength: 3, Hidden: 16, TopK: 5, LearningRate: 0.02, Polyak: 0.1, Seed: 42}
	a := newTrainer(t, b, cfg)
	run(t, a, 5)
	ckpt := save(t, a)
	wantSamples, wantStats := run(t, a, 5)

	r, err := policy.Load(bytes.NewReader(ckpt), b)
	require.NoError(t, err)
	assert.Falsef(t, r.Step() != 5 || !reflect.DeepEqual(r.Config(), a.Config()), "restored step %d config %+v, want 5 and %+v", r.Step(), r.Config(), a.Config())
	gotSamples, gotStats := run(t, r, 5)
	assert.Truef(t, reflect.DeepEqual(gotSamples, wantSamples), "samples after resume differ:\ngot  %v\nwant %v", gotSamples, wantSamples)
	assert.Truef(t, reflect.DeepEqual(gotStats, wantStats), "stats after resume differ:\ngot  %+v\nwant %+v", gotStats, wantStats)
	// The checkpoint holds parameters, target, moments, RNG and step as
	// exact bits, so equal checkpoints mean bit-for-bit equal trainers.
	assert.True(t, bytes.Equal(save(t, r), save(t, a)), "final states differ")
}

// reencode rewrites a checkpoint's payload with edit and a valid header.
func reencode(t *testing.T, ckpt []byte, edit func(map[string]any)) []byte {
	t.Helper()
	i := bytes.IndexByte(ckpt, '\n')
	var st map[string]any
	require.NoError(t, json.Unmarshal(ckpt[i+1:], &st))
	edit(st)
	payload, err := json.Marshal(st)
	require.NoError(t, err)
	return withHeader(1, payload)
}

func withHeader(version int, payload []byte) []byte {
	return append(fmt.Appendf(nil, "stint-policy-checkpoint %d %d %x\n", version, len(payload), sha256.Sum256(payload)), payload...)
}

func TestLoadRefuses(t *testing.T) {
	b := newPosBackbone(16, 3, 5)
	ckpt := save(t, newTrainer(t, b, policy.Config{PromptLength: 3, Hidden: 8}))
	header := bytes.IndexByte(ckpt, '\n') + 1
	flipped := bytes.Clone(ckpt)
	flipped[header+len(ckpt[header:])/2] ^= 0x04
	otherHead := newPosBackbone(16, 3, 6) // same shape, other weights
	tests := []struct {
		name string
		data []byte
		b    policy.Backbone
		want error
		msg  string
	}{
		{"empty", nil, b, policy.ErrCheckpoint, "header"},
		{"not a checkpoint", []byte("{\"hello\": 1}\n"), b, policy.ErrCheckpoint, "not a policy checkpoint"},
		{"newer version", withHeader(2, ckpt[header:]), b, policy.ErrCheckpoint, "version 2"},
		{"truncated", ckpt[:len(ckpt)-10], b, policy.ErrCheckpoint, "truncated"},
		{"flipped bit", flipped, b, policy.ErrCheckpoint, "checksum mismatch"},
		{"bad checksum field", []byte("stint-policy-checkpoint 1 2 zz\n{}"), b, policy.ErrCheckpoint, "checksum"},
		{"bad size field", []byte("stint-policy-checkpoint 1 -4 00\n"), b, policy.ErrCheckpoint, "size"},
		{"valid header, bad JSON", withHeader(1, []byte("{\"Config\":")), b, policy.ErrCheckpoint, "payload"},
		{"unknown field", reencode(t, ckpt, func(m map[string]any) { m["Extra"] = 1 }), b, policy.ErrCheckpoint, "Extra"},
		{"short parameters", reencode(t, ckpt, func(m map[string]any) { m["Params"] = "AAAAAAAAAAA=" }), b, policy.ErrCheckpoint, "Params"},
		{"bad config", reencode(t, ckpt, func(m map[string]any) { m["Config"].(map[string]any)["Polyak"] = 2 }), b, policy.ErrCheckpoint, "Polyak"},
		{"bad rng", reencode(t, ckpt, func(m map[string]any) { m["RNG"] = "AAAA" }), b, policy.ErrCheckpoint, "rng"},
		{"other head shape", ckpt, newPosBackbone(8, 3, 5), policy.ErrMismatch, "head is"},
		{"other head weights", ckpt, otherHead, policy.ErrMismatch, "weights"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			_, err := policy.Load(bytes.NewReader(tc.data), tc.b)
			assert.Falsef(t, !errors.Is(err, tc.want) || !strings.Contains(err.Error(), tc.msg), "got %v, want %v saying %q", err, tc.want, tc.msg)
		})
	}
}

func TestSaveFile(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "policy.ckpt")
	b := newPosBackbone(16, 3, 5)
	tr := newTrainer(t, b, policy.Config{PromptLength: 3, Hidden: 8})
	run(t, tr, 2)
	require.NoError(t, tr.SaveFile(path))
	r, err := policy.LoadFile(path, b)
	require.NoError(t, err)
	assert.True(t, bytes.Equal(save(t, r), save(t, tr)), "LoadFile(SaveFile) changed the state")
	// A failing writer leaves the old file whole and no temporary file.
	old, _ := os.ReadFile(path)
	boom := errors.New("boom")
	err = policy.WriteFileAtomic(path, func(w io.Writer) error {
		w.Write([]byte("partial"))
		return boom
	})
	assert.ErrorIs(t, err, boom, "WriteFileAtomic: got %v, want the writer's error", err)
	now, _ := os.ReadFile(path)
	assert.True(t, bytes.Equal(now, old), "failed write changed the file")
	entries, _ := os.ReadDir(dir)
	assert.Len(t, entries, 1, "directory holds %d entries after a failed write, want 1", len(entries))
	_, err = policy.LoadFile(filepath.Join(dir, "missing"), b)
	assert.ErrorIs(t, err, os.ErrNotExist, "LoadFile(missing): got %v", err)
}
