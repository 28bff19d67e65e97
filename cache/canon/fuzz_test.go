package canon

import (
	"bytes"
	"encoding/json"
	"testing"

	"github.com/gowebpki/jcs"
	"github.com/stretchr/testify/require"
)

// FuzzCanonical checks, for any input: Transform never panics; its output is
// a fixed point (canon(canon(x)) == canon(x)); it agrees with gowebpki/jcs on
// what is accepted and on the output; and Marshal of the encoding/json
// decoding of accepted input gives the same bytes.
func FuzzCanonical(f *testing.F) {
	for _, in := range corpus {
		f.Add([]byte(in))
	}
	for _, tc := range invalid {
		if len(tc.in) < 200 {
			f.Add([]byte(tc.in))
		}
	}
	f.Add([]byte(`{"\ud83d\ude00":1,"\ue000":2,"\uff61":3,"\u00e9":4}`))
	f.Add([]byte(`[1e-7,1e21,-0,0.1e1,5e-324,123456789012345678]`))

	f.Fuzz(func(t *testing.T, in []byte) {
		got, err := Transform(in)
		want, jerr := jcs.Transform(in)
		require.Equal(t, jerr == nil, err == nil, "Transform(%q): err = %v, gowebpki/jcs err = %v", in, err, jerr)
		if err != nil {
			return
		}
		require.Equal(t, string(want), string(got), "Transform(%q), against gowebpki/jcs", in)
		again, err := Transform(got)
		require.NoError(t, err, "Transform(Transform(%q))", in)
		require.Equal(t, string(got), string(again), "Transform(Transform(%q)): a fixed point", in)
		d := json.NewDecoder(bytes.NewReader(in))
		d.UseNumber()
		var v any
		require.NoError(t, d.Decode(&v), "encoding/json rejects %q, which Transform accepted", in)
		viaValue, err := Marshal(v)
		require.NoError(t, err, "Marshal(decode(%q))", in)
		require.Equal(t, string(got), string(viaValue), "Marshal(decode(%q))", in)
	})
}
