package canon

import (
	"bytes"
	"encoding/json"
	"testing"

	"github.com/gowebpki/jcs"
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
		if (err == nil) != (jerr == nil) {
			t.Fatalf("Transform(%q): err = %v, gowebpki/jcs err = %v", in, err, jerr)
		}
		if err != nil {
			return
		}
		if !bytes.Equal(got, want) {
			t.Fatalf("Transform(%q)\n got %q\nwant %q (gowebpki/jcs)", in, got, want)
		}
		again, err := Transform(got)
		if err != nil || !bytes.Equal(again, got) {
			t.Fatalf("Transform(Transform(%q)) = %q, %v; want %q", in, again, err, got)
		}
		d := json.NewDecoder(bytes.NewReader(in))
		d.UseNumber()
		var v any
		if err := d.Decode(&v); err != nil {
			t.Fatalf("encoding/json rejects %q, which Transform accepted: %v", in, err)
		}
		viaValue, err := Marshal(v)
		if err != nil || !bytes.Equal(viaValue, got) {
			t.Fatalf("Marshal(decode(%q)) = %q, %v; want %q", in, viaValue, err, got)
		}
	})
}
