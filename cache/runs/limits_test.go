package runs_test

import (
	"archive/tar"
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"path/filepath"
	"runtime"
	"runtime/debug"
	"runtime/metrics"
	"strconv"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/klauspost/compress/zstd"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
	"go.etcd.io/bbolt"

	"github.com/stintlab/stint/cache/boltgroup"
	"github.com/stintlab/stint/cache/runs"
	"github.com/stintlab/stint/internal/redistest"
)

// craftedBody is one body of a crafted archive: size bytes, the first of
// them mark and the rest zeros (so distinct bodies compress to almost
// nothing, as the bodies of a decompression bomb do).
type craftedBody struct {
	size int64
	mark byte
}

func (b craftedBody) reader() io.Reader {
	return io.MultiReader(bytes.NewReader([]byte{b.mark}), io.LimitReader(zeros{}, b.size-1))
}

type zeros struct{}

func (zeros) Read(p []byte) (int, error) { clear(p); return len(p), nil }

// craftArchive writes, without holding any body whole, a well-formed
// archive of run "crafted": one entry per body (status 200, JSON), and the
// bodies. It is what a hostile team could upload: every check passes but
// the sizes.
func craftArchive(t testing.TB, bodies []craftedBody) []byte {
	t.Helper()
	type member struct {
		Name   string `json:"name"`
		Size   int64  `json:"size"`
		SHA256 string `json:"sha256"`
	}
	var (
		entries bytes.Buffer
		members []member
		total   int64
	)
	for i, b := range bodies {
		h := sha256.New()
		_, err := io.Copy(h, b.reader())
		require.NoError(t, err)
		ref := hex.EncodeToString(h.Sum(nil))
		members = append(members, member{Name: "bodies/" + ref, Size: b.size, SHA256: ref})
		total += b.size
		fmt.Fprintf(&entries, `{"seq":%d,"key":%q,"occurrence":1,"ref":%q,"status":200,"content_type":"application/json","stream":false,"outcome":"miss","upstream":true,"cost_nanos":0,"saved_nanos":0,"model":"m","time":%q}`+"\n",
			i+1, keyOf(fmt.Sprint("crafted-", i)), ref, base.Add(time.Duration(i)*time.Second).Format(time.RFC3339Nano))
	}
	sum := sha256.Sum256(entries.Bytes())
	members = append([]member{{Name: "entries", Size: int64(entries.Len()), SHA256: hex.EncodeToString(sum[:])}}, members...)
	n := len(bodies)
	man, err := json.Marshal(map[string]any{
		"format": "stint-run-archive", "version": 1, "team": "hostile", "run": "crafted", "created": base,
		"entries": n,
		"summary": map[string]any{"first": base, "last": base.Add(time.Duration(n-1) * time.Second), "calls": n, "upstream": n,
			"cost_nanos": 0, "saved_nanos": 0, "keys": n, "bodies": n, "bytes": total},
		"members": members,
	})
	require.NoError(t, err)
	var out bytes.Buffer
	zw, err := zstd.NewWriter(&out)
	require.NoError(t, err)
	tw := tar.NewWriter(zw)
	put := func(name string, size int64, r io.Reader) {
		require.NoError(t, tw.WriteHeader(&tar.Header{Name: name, Typeflag: tar.TypeReg, Size: size, Mode: 0o644, Format: tar.FormatUSTAR}))
		_, err := io.Copy(tw, r)
		require.NoError(t, err)
	}
	put("manifest.json", int64(len(man)), bytes.NewReader(man))
	put("entries", int64(entries.Len()), &entries)
	for i, b := range bodies {
		put(members[i+1].Name, b.size, b.reader())
	}
	require.NoError(t, tw.Close())
	require.NoError(t, zw.Close())
	return withTrailer(out.Bytes())
}

// quotaBackends are the embedded and Redis journals with a storage quota.
func quotaBackends(t *testing.T, quota int64) []backend {
	c := redistest.Start(t).Client(t)
	var n atomic.Int64
	return []backend{
		{name: "bolt", open: func(t testing.TB) runs.Journal {
			db, err := bbolt.Open(filepath.Join(t.TempDir(), "stint.db"), 0o600, &bbolt.Options{NoFreelistSync: true})
			require.NoError(t, err)
			t.Cleanup(func() { _ = db.Close() })
			j, err := runs.NewBolt(db, runs.BoltOptions{Update: boltgroup.New(db).Update, QuotaBytes: quota})
			require.NoError(t, err)
			return j
		}},
		{name: "redis", open: func(testing.TB) runs.Journal {
			return runs.NewRedis(c, runs.RedisOptions{Prefix: "q" + strconv.FormatInt(n.Add(1), 10), QuotaBytes: quota})
		}},
	}
}

// TestImportDoesNotHoldBodies imports a crafted archive of three 60 MB
// bodies, a few KB compressed, into each backend and watches the heap
// meanwhile: it never grows by as much as one body, since bodies are
// written as they are read, never inflated whole first.
func TestImportDoesNotHoldBodies(t *testing.T) {
	const size = 60 << 20
	archive := craftArchive(t, []craftedBody{{size, 1}, {size, 2}, {size, 3}})
	t.Logf("archive of 3 bodies of %d MB: %d bytes", size>>20, len(archive))
	for _, b := range []backend{boltBackend(), redisBackend(t)} {
		t.Run(b.name, func(t *testing.T) {
			j := b.open(t)
			defer debug.SetGCPercent(debug.SetGCPercent(10))
			peak := watchHeap(t, func() {
				_, err := j.Import(context.Background(), "lab", bytes.NewReader(archive), runs.ImportOptions{})
				require.NoError(t, err)
			})
			t.Logf("the heap grew by at most %.1f MB importing 3 bodies of %d MB", float64(peak)/(1<<20), size>>20)
			assert.Less(t, peak, int64(size), "the heap grew by %d MB during the import", peak>>20)
			_, a, err := j.Lookup(context.Background(), "lab", "crafted", keyOf("crafted-2"), 1)
			require.NoError(t, err)
			assert.Equal(t, size, len(a.Body))
			assert.Equal(t, byte(3), a.Body[0])
		})
	}
}

// watchHeap runs fn and returns by how much the live heap grew at most
// while it ran (sampled every millisecond, after a GC before it).
func watchHeap(t *testing.T, fn func()) int64 {
	t.Helper()
	sample := []metrics.Sample{{Name: "/memory/classes/heap/objects:bytes"}}
	read := func() int64 { metrics.Read(sample); return int64(sample[0].Value.Uint64()) }
	runtime.GC()
	start := read()
	var (
		peak int64
		wg   sync.WaitGroup
	)
	stop := make(chan struct{})
	wg.Go(func() {
		tick := time.NewTicker(time.Millisecond)
		defer tick.Stop()
		for {
			peak = max(peak, read()-start)
			select {
			case <-stop:
				return
			case <-tick.C:
			}
		}
	})
	fn()
	close(stop)
	wg.Wait()
	return peak
}

// TestImportSizeLimits: a crafted archive past a limit is refused with
// ErrTooLarge as soon as its manifest is read, before any body is
// inflated, on the default limits too; and a body bigger than the manifest
// says is refused while it is read.
func TestImportSizeLimits(t *testing.T) {
	t.Parallel()
	const mb = 1 << 20
	tests := []struct {
		name   string
		bodies []craftedBody
		opts   runs.ImportOptions
	}{
		{"five 60 MB bodies, default limits", []craftedBody{{60 * mb, 1}, {60 * mb, 2}, {60 * mb, 3}, {60 * mb, 4}, {60 * mb, 5}}, runs.ImportOptions{}},
		{"a body over the default body limit", []craftedBody{{runs.MaxBodyBytes + 1, 1}}, runs.ImportOptions{}},
		{"archive over MaxBytes", []craftedBody{{3 * mb, 1}, {3 * mb, 2}}, runs.ImportOptions{MaxBytes: 4 * mb}},
		{"body over MaxBodyBytes", []craftedBody{{2 * mb, 1}}, runs.ImportOptions{MaxBodyBytes: mb}},
		{"members over MaxMembers", []craftedBody{{10, 1}, {10, 2}, {10, 3}}, runs.ImportOptions{MaxMembers: 3}},
		{"entries over MaxEntries", []craftedBody{{10, 1}, {10, 2}, {10, 3}}, runs.ImportOptions{MaxEntries: 2}},
	}
	for _, b := range []backend{boltBackend(), redisBackend(t)} {
		for _, tt := range tests {
			t.Run(b.name+"/"+tt.name, func(t *testing.T) {
				archive := craftArchive(t, tt.bodies)
				j := b.open(t)
				src := &countingReader{r: bytes.NewReader(archive)}
				_, err := j.Import(context.Background(), "lab", src, tt.opts)
				assert.ErrorIs(t, err, runs.ErrTooLarge)
				assert.Less(t, src.n, int64(len(archive)), "refused before the whole archive was read")
				wantNoTrace(t, j, "lab", "crafted")
			})
		}
	}
}

type countingReader struct {
	r io.Reader
	n int64
}

func (c *countingReader) Read(p []byte) (int, error) {
	n, err := c.r.Read(p)
	c.n += int64(n)
	return n, err
}

// TestQuota gives each team 1 MiB on each backend: Records stop at the
// quota with a QuotaError and nothing stored; an import that does not fit
// is refused before anything is written; deleting a run frees its share;
// replacing a run counts the replaced run's share as freed; and one team's
// quota is its own.
func TestQuota(t *testing.T) {
	t.Parallel()
	const quota = 1 << 20
	for _, b := range quotaBackends(t, quota) {
		t.Run(b.name, func(t *testing.T) {
			j := b.open(t)
			ctx := context.Background()
			body := jsonAnswer(string(bytes.Repeat([]byte("q"), 100_000)))
			var recorded int
			var qerr *runs.QuotaError
			for i := range 20 {
				c := runs.Entry{Key: keyOf(fmt.Sprint("k", i)), Time: base}
				a := body
				a.Body = append(bytes.Clone(a.Body), byte(i)) // distinct
				_, err := j.Record(ctx, "lab", "fill", c, a)
				if err != nil {
					require.ErrorAs(t, err, &qerr, "Record past the quota")
					break
				}
				recorded++
			}
			require.Equal(t, 10, recorded, "ten bodies of 100 kB fit in 1 MiB, the eleventh does not")
			assert.Equal(t, "lab", qerr.Team)
			assert.EqualValues(t, quota, qerr.Quota)
			u, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			assert.EqualValues(t, quota, u.QuotaBytes)
			assert.LessOrEqual(t, u.Bytes, int64(quota))
			assert.Greater(t, u.Bytes, int64(10*100_000))
			s, err := j.Summary(ctx, "lab", "fill")
			require.NoError(t, err)
			assert.EqualValues(t, recorded, s.Calls, "the refused Record stored nothing")
			// The same body again costs only its entry.
			_, err = j.Record(ctx, "lab", "fill", runs.Entry{Key: keyOf("k0"), Time: base}, runs.Answer{Status: 200, ContentType: "application/json", Body: append(bytes.Clone(body.Body), 0)})
			assert.NoError(t, err, "a repeat of a stored body fits")

			// Another team's quota is its own.
			_, err = j.Record(ctx, "kiln", "r", runs.Entry{Key: keyOf("k"), Time: base}, body)
			assert.NoError(t, err)

			// An import that does not fit is refused, and writes nothing.
			archive := craftArchive(t, []craftedBody{{300_000, 1}})
			before, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			_, err = j.Import(ctx, "lab", bytes.NewReader(archive), runs.ImportOptions{})
			require.ErrorAs(t, err, &qerr, "Import past the quota")
			_, err = j.Summary(ctx, "lab", "crafted")
			assert.ErrorIs(t, err, runs.ErrNotFound)
			after, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			assert.Equal(t, before, after, "the refused import holds nothing")

			// Deleting frees the run's share; then the import fits.
			require.NoError(t, j.Delete(ctx, "lab", "fill"))
			u, err = j.Usage(ctx, "lab")
			require.NoError(t, err)
			assert.Zero(t, u.Bytes, "no runs, nothing held")
			_, err = j.Import(ctx, "lab", bytes.NewReader(archive), runs.ImportOptions{})
			require.NoError(t, err)
			one, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			assert.Greater(t, one.Bytes, int64(300_000))

			// Replacing a run frees what it held: the same archive again,
			// three times over, holds what one copy holds.
			for range 3 {
				_, err = j.Import(ctx, "lab", bytes.NewReader(archive), runs.ImportOptions{Replace: true})
				require.NoError(t, err)
			}
			again, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			assert.Equal(t, one.Bytes, again.Bytes)
			// Four copies do not fit.
			var i int
			for i = range 4 {
				if _, err = j.Import(ctx, "lab", bytes.NewReader(archive), runs.ImportOptions{As: fmt.Sprint("copy-", i)}); err != nil {
					break
				}
			}
			assert.ErrorIs(t, err, runs.ErrQuota)
			assert.Equal(t, 2, i, "the original and two copies fit in 1 MiB, not a third")
		})
	}
}

// TestOnlyWhatARecordingProduces: an archive entry, or a Record, whose
// answer no recording of the wire format produces is refused: a status an
// upstream answer cannot have with a body (1xx, 204, 205, 206, 3xx, or
// past 599) and content types other than application/json and
// text/event-stream (the latter only for a streamed answer). Replay would
// otherwise answer them as they are.
func TestOnlyWhatARecordingProduces(t *testing.T) {
	t.Parallel()
	good := exampleArchive(t, smallCalls())
	tests := []struct {
		name   string
		status int
		ctype  string
		stream bool
		ok     bool
	}{
		{"200 JSON", 200, "application/json", false, true},
		{"200 JSON with charset", 200, "application/json; charset=utf-8", false, true},
		{"429 JSON", 429, "application/json", false, true},
		{"503 JSON", 503, "application/json", false, true},
		{"200 stream", 200, "text/event-stream", true, true},
		{"101", 101, "application/json", false, false},
		{"204", 204, "application/json", false, false},
		{"205", 205, "application/json", false, false},
		{"302", 302, "application/json", false, false},
		{"304", 304, "application/json", false, false},
		{"600", 600, "application/json", false, false},
		{"999", 999, "application/json", false, false},
		{"text/html", 200, "text/html", false, false},
		{"text/html with charset", 200, "text/html; charset=utf-8", false, false},
		{"no content type", 200, "", false, false},
		{"JSON called a stream", 200, "application/json", true, false},
		{"stream not called one", 200, "text/event-stream", false, false},
		{"stream with an error status", 500, "text/event-stream", true, false},
	}
	for _, b := range []backend{boltBackend(), redisBackend(t)} {
		for _, tt := range tests {
			t.Run(b.name+"/"+tt.name, func(t *testing.T) {
				j := b.open(t)
				p := explode(t, good)
				p.entries[0]["status"] = tt.status
				p.entries[0]["content_type"] = tt.ctype
				p.entries[0]["stream"] = tt.stream
				_, err := j.Import(context.Background(), "lab", bytes.NewReader(p.build(t, true)), runs.ImportOptions{})
				_, rerr := j.Record(context.Background(), "lab", "rec", runs.Entry{Key: keyOf("k"), Time: base},
					runs.Answer{Status: tt.status, ContentType: tt.ctype, Stream: tt.stream, Body: []byte(`{}`)})
				if tt.ok {
					assert.NoError(t, err, "Import")
					assert.NoError(t, rerr, "Record")
					return
				}
				assert.ErrorIs(t, err, runs.ErrCorruptArchive, "Import")
				wantNoTrace(t, j, "lab", "small")
				assert.ErrorIs(t, rerr, runs.ErrInvalid, "Record")
			})
		}
	}
}

// TestChunkedBodiesRoundTrip imports bodies long enough to be written in
// chunks, on each backend: they replay whole, export to the same archive
// members, import again elsewhere, and count once when recorded again.
func TestChunkedBodiesRoundTrip(t *testing.T) {
	t.Parallel()
	bodies := []craftedBody{{2<<20 + 12345, 1}, {1 << 20, 2}, {3 << 20, 3}}
	archive := craftArchive(t, bodies)
	want := readMembers(t, archive)
	for _, b := range []backend{boltBackend(), redisBackend(t)} {
		t.Run(b.name, func(t *testing.T) {
			ctx := context.Background()
			j := b.open(t)
			s, err := j.Import(ctx, "lab", bytes.NewReader(archive), runs.ImportOptions{})
			require.NoError(t, err)
			for i, cb := range bodies {
				_, a, err := j.Lookup(ctx, "lab", "crafted", keyOf(fmt.Sprint("crafted-", i)), 1)
				require.NoError(t, err)
				body, _ := io.ReadAll(cb.reader())
				assert.True(t, bytes.Equal(body, a.Body), "body %d replays whole", i)
			}
			var out bytes.Buffer
			require.NoError(t, j.Export(ctx, "lab", "crafted", &out))
			got := readMembers(t, out.Bytes())
			require.Len(t, got, len(want))
			for i := 1; i < len(want); i++ {
				assert.Equal(t, want[i].name, got[i].name)
				assert.True(t, bytes.Equal(want[i].data, got[i].data), "member %s", want[i].name)
			}
			again, err := j.Import(ctx, "kiln", bytes.NewReader(out.Bytes()), runs.ImportOptions{})
			require.NoError(t, err)
			s.Team = "kiln"
			assert.True(t, sameSummary(s, again), "%+v vs %+v", s, again)

			before, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			body, _ := io.ReadAll(bodies[0].reader())
			_, err = j.Record(ctx, "lab", "crafted", runs.Entry{Key: keyOf("again"), Time: base},
				runs.Answer{Status: 200, ContentType: "application/json", Body: body})
			require.NoError(t, err)
			after, err := j.Usage(ctx, "lab")
			require.NoError(t, err)
			assert.Less(t, after.Bytes-before.Bytes, int64(1024), "a chunked body recorded again is not stored again")
			sum, err := j.Summary(ctx, "lab", "crafted")
			require.NoError(t, err)
			assert.EqualValues(t, len(bodies), sum.Bodies)
		})
	}
}
