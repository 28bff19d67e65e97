package policy

import (
	"bufio"
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"reflect"
	"strconv"
	"strings"
)

// Checkpoint format: one header line
//
//	stint-policy-checkpoint <version> <payload bytes> <payload sha256 hex>\n
//
// followed by the payload, a JSON object (checkpointState). Parameter
// vectors are little-endian float64 bits (base64 in JSON), so they round-trip
// exactly.
const (
	checkpointMagic   = "stint-policy-checkpoint"
	checkpointVersion = 1
	// maxHeader bounds the header line.
	maxHeader = 256
)

// checkpointState is the payload of checkpoint version 1.
type checkpointState struct {
	Config Config
	// HeadRows, HeadCols and HeadSHA256 identify the backbone's head.
	HeadRows, HeadCols int
	HeadSHA256         string
	Params, Target     []byte
	AdamM, AdamV       []byte
	AdamStep           int
	RNG                []byte
}

// Save writes the trainer's whole state to w. Load with the same backbone
// restores a trainer that continues exactly as this one would.
func (t *Trainer) Save(w io.Writer) error {
	rows, cols, data := t.b.OutputHead()
	rng, err := t.pcg.MarshalBinary()
	if err != nil {
		return fmt.Errorf("policy: save rng: %w", err)
	}
	st := checkpointState{
		Config:     t.Config(),
		HeadRows:   rows,
		HeadCols:   cols,
		HeadSHA256: headSum(data),
		Params:     floatsBytes(t.params),
		Target:     floatsBytes(t.target),
		AdamM:      floatsBytes(t.opt.m),
		AdamV:      floatsBytes(t.opt.v),
		AdamStep:   t.opt.t,
		RNG:        rng,
	}
	payload, err := json.Marshal(st)
	if err != nil {
		return fmt.Errorf("policy: encode checkpoint: %w", err)
	}
	sum := sha256.Sum256(payload)
	if _, err := fmt.Fprintf(w, "%s %d %d %x\n", checkpointMagic, checkpointVersion, len(payload), sum); err != nil {
		return fmt.Errorf("policy: write checkpoint: %w", err)
	}
	if _, err := w.Write(payload); err != nil {
		return fmt.Errorf("policy: write checkpoint: %w", err)
	}
	return nil
}

// Load reads a checkpoint written by Save and returns the trainer, running
// on backbone b, which must have the same output head as the one saved.
// Errors wrap ErrCheckpoint (corrupt, truncated, unknown version,
// inconsistent) or ErrMismatch (another backbone).
func Load(r io.Reader, b Backbone) (*Trainer, error) {
	payload, err := readPayload(r)
	if err != nil {
		return nil, err
	}
	var st checkpointState
	dec := json.NewDecoder(bytes.NewReader(payload))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&st); err != nil {
		return nil, fmt.Errorf("%w: payload: %w", ErrCheckpoint, err)
	}
	rows, cols, data := b.OutputHead()
	if rows != st.HeadRows || cols != st.HeadCols {
		return nil, fmt.Errorf("%w: checkpoint head is %d×%d, backbone head is %d×%d", ErrMismatch, st.HeadRows, st.HeadCols, rows, cols)
	}
	if len(data) != rows*cols {
		return nil, fmt.Errorf("%w: output head is %d×%d with %d values", ErrBackbone, rows, cols, len(data))
	}
	if headSum(data) != st.HeadSHA256 {
		return nil, fmt.Errorf("%w: backbone head weights differ from the checkpoint's", ErrMismatch)
	}
	cfg, err := st.Config.withDefaults(rows)
	if err != nil {
		return nil, fmt.Errorf("%w: %w", ErrCheckpoint, err)
	}
	if !reflect.DeepEqual(cfg, st.Config) {
		return nil, fmt.Errorf("%w: config %+v is not in its filled-in form", ErrCheckpoint, st.Config)
	}
	t := newTrainer(b, cfg, cols, data)
	n := t.net.size()
	for _, v := range []struct {
		name string
		dst  []float64
		src  []byte
	}{{"Params", t.params, st.Params}, {"Target", t.target, st.Target}, {"AdamM", t.opt.m, st.AdamM}, {"AdamV", t.opt.v, st.AdamV}} {
		if len(v.src) != 8*n {
			return nil, fmt.Errorf("%w: %s has %d bytes, want %d", ErrCheckpoint, v.name, len(v.src), 8*n)
		}
		bytesFloats(v.dst, v.src)
	}
	if st.AdamStep < 0 {
		return nil, fmt.Errorf("%w: AdamStep %d is negative", ErrCheckpoint, st.AdamStep)
	}
	t.opt.t = st.AdamStep
	if err := t.pcg.UnmarshalBinary(st.RNG); err != nil {
		return nil, fmt.Errorf("%w: rng state: %w", ErrCheckpoint, err)
	}
	t.rng = rand.New(t.pcg)
	return t, nil
}

// readPayload reads and checks the header and returns the payload.
func readPayload(r io.Reader) ([]byte, error) {
	br := bufio.NewReaderSize(r, maxHeader)
	line, err := br.ReadSlice('\n')
	if err != nil {
		return nil, fmt.Errorf("%w: header: %w", ErrCheckpoint, err)
	}
	f := strings.Fields(string(line))
	if len(f) != 4 || f[0] != checkpointMagic {
		return nil, fmt.Errorf("%w: not a policy checkpoint (header %.40q)", ErrCheckpoint, line)
	}
	if f[1] != strconv.Itoa(checkpointVersion) {
		return nil, fmt.Errorf("%w: version %s, this build reads version %d", ErrCheckpoint, f[1], checkpointVersion)
	}
	size, err := strconv.ParseInt(f[2], 10, 64)
	if err != nil || size < 0 {
		return nil, fmt.Errorf("%w: payload size %q", ErrCheckpoint, f[2])
	}
	want, err := hex.DecodeString(f[3])
	if err != nil || len(want) != sha256.Size {
		return nil, fmt.Errorf("%w: checksum %q", ErrCheckpoint, f[3])
	}
	// Read through a limit instead of allocating size bytes up front, so a
	// corrupt size cannot cause a huge allocation.
	var buf bytes.Buffer
	got, err := buf.ReadFrom(io.LimitReader(br, size))
	if err != nil {
		return nil, fmt.Errorf("%w: payload: %w", ErrCheckpoint, err)
	}
	if got != size {
		return nil, fmt.Errorf("%w: truncated: payload has %d of %d bytes", ErrCheckpoint, got, size)
	}
	if sum := sha256.Sum256(buf.Bytes()); !bytes.Equal(sum[:], want) {
		return nil, fmt.Errorf("%w: checksum mismatch", ErrCheckpoint)
	}
	return buf.Bytes(), nil
}

// headSum is the SHA-256 (hex) of the head's float32 bits.
func headSum(data []float32) string {
	h := sha256.New()
	var b [4]byte
	for _, v := range data {
		binary.LittleEndian.PutUint32(b[:], math.Float32bits(v))
		h.Write(b[:])
	}
	return hex.EncodeToString(h.Sum(nil))
}

func floatsBytes(x []float64) []byte {
	b := make([]byte, 8*len(x))
	for i, v := range x {
		binary.LittleEndian.PutUint64(b[8*i:], math.Float64bits(v))
	}
	return b
}

func bytesFloats(dst []float64, b []byte) {
	for i := range dst {
		dst[i] = math.Float64frombits(binary.LittleEndian.Uint64(b[8*i:]))
	}
}
