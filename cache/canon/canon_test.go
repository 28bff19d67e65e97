package canon

import (
	"encoding/json"
	"math"
	"strings"
	"testing"

	"github.com/gowebpki/jcs"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// corpus is JSON the cross-checks run on: request-shaped bodies, every value
// type, escapes, sorting corner cases and number edge cases.
var corpus = []string{
	`null`, `true`, `false`, `0`, `-0`, `1`, `-1`, `0.5`, `-0.0`, ` 42 `, "\t[]\n", `{}`, `""`,
	`123456789012345`, `1234567890123456`, `12345678901234567890`, `9007199254740993`,
	`1e21`, `1E21`, `1e20`, `100000000000000000000`, `1e-6`, `1e-7`, `0.000001`, `1.5e-7`,
	`1e-400`, `-1e-400`, `5e-324`, `1.7976931348623157e308`, `2.5E+10`, `1e+0`, `0e5`, `-0e-5`,
	`0.1`, `0.30000000000000004`, `123.456e2`, `1.0`, `10.00`, `4.50`, `3.141592653589793238462643383279`,
	`[1,2,3]`, `[ 1 , [ 2 , [ 3 ] ] ]`, `[{}, [], "", 0, null]`,
	`{"b":1,"a":2}`, `{"a":{"d":1,"c":[{"f":1,"e":2}]},"b":[3,{"z":0,"y":1}]}`,
	`{"\u0061":1,"b":2}`, `{"é":1,"e":2,"f":3}`, `{"\ufb33":1,"\ud83d\ude00":2,"\ue000":3,"\uffff":4}`,
	`{"aa":1,"a":2,"":3,"ab":4}`, `{"\u0000":1,"\u0001":2," ":3}`,
	`"\u20ac$\u000F\u000aA'\u0042\u0022\u005c\\\"\/"`, `"tab\there"`, `"π ≈ 3.14159 — 日本語"`,
	`{"model":"tern-7","temperature":0,"max_tokens":64,"prompt":["say \"hi\"","bye\n"],"logprobs":5,"stop":null,"echo":false}`,
	`{"model":"tern-7","messages":[{"role":"system","content":"You grade haiku."},{"role":"user","content":"Rate: 'frost on the tin roof'"}],"temperature":0.0,"top_p":1,"n":1,"seed":42,"logit_bias":{"50256":-100,"198":-1.5}}`,
	`{"x":[1e2,1E-2,-12.5e+3,0.0000012345,123456789012345678901234567890]}`,
}

// invalid is input both canonicalizers must reject, with the sentinel ours
// wraps.
var invalid = []struct {
	in   string
	want error
}{
	{``, ErrSyntax},
	{` `, ErrSyntax},
	{`{`, ErrSyntax},
	{`[1,]`, ErrSyntax},
	{`[1 2]`, ErrSyntax},
	{`{"a" 1}`, ErrSyntax},
	{`{"a":1,}`, ErrSyntax},
	{`{a:1}`, ErrSyntax},
	{`{"a":1}}`, ErrSyntax},
	{`[] []`, ErrSyntax},
	{`tru`, ErrSyntax},
	{`nulls`, ErrSyntax},
	{`01`, ErrSyntax},
	{`+1`, ErrSyntax},
	{`.5`, ErrSyntax},
	{`1.`, ErrSyntax},
	{`1e`, ErrSyntax},
	{`-`, ErrSyntax},
	{`0x10`, ErrSyntax},
	{`NaN`, ErrSyntax},
	{`Infinity`, ErrSyntax},
	{`"abc`, ErrSyntax},
	{"\"a\nb\"", ErrSyntax},
	{`"\x"`, ErrSyntax},
	{`"\u12"`, ErrSyntax},
	{`"\u12G4"`, ErrSyntax},
	{"\"\xff\"", ErrSyntax},
	{"\"\xed\xa0\x80\"", ErrSyntax}, // a surrogate encoded directly in UTF-8
	{"\"\xc0\xaf\"", ErrSyntax},     // overlong '/'
	{`1e400`, ErrNumberRange},
	{`-1e400`, ErrNumberRange},
	{`[1.8e308]`, ErrNumberRange},
	{`{"a":1,"a":2}`, ErrDuplicateKey},
	{`{"a":1,"\u0061":2}`, ErrDuplicateKey},
	{`{"b":{"x":1,"x":1}}`, ErrDuplicateKey},
	{`"\ud800"`, ErrLoneSurrogate},
	{`"\udc00"`, ErrLoneSurrogate},
	{`"\ud800\u0041"`, ErrLoneSurrogate},
	{`"\ud800x"`, ErrLoneSurrogate},
	{`{"\ud83d":1}`, ErrLoneSurrogate},
	{`"\ud800\`, ErrLoneSurrogate},
	{`"\ud800\udc0"`, ErrLoneSurrogate},
	{`"\udbff\udbff"`, ErrLoneSurrogate},
	{strings.Repeat("[", MaxDepth+1) + strings.Repeat("]", MaxDepth+1), ErrTooDeep},
}

func TestTransformMatchesJCS(t *testing.T) {
	for _, in := range corpus {
		got, err := Transform([]byte(in))
		if !assert.NoError(t, err, "Transform(%s)", in) {
			continue
		}
		want, err := jcs.Transform([]byte(in))
		if !assert.NoError(t, err, "jcs.Transform(%s)", in) {
			continue
		}
		assert.Equal(t, string(want), string(got), "Transform(%s), against gowebpki/jcs", in)
	}
}

func TestTransformExamples(t *testing.T) {
	tests := []struct{ in, want string }{
		{` { "b" : [ 1 , 2 ] , "a" : { } } `, `{"a":{},"b":[1,2]}`},
		{`-0`, `0`},
		{`-0.0e10`, `0`},
		{`1.0`, `1`},
		{`1e21`, `1e+21`},
		{`1e-7`, `1e-7`},
		{`123e-2`, `1.23`},
		{`1e-400`, `0`},
		{`9007199254740993`, `9007199254740992`},
		{`{"aa":1,"a":2,"":3,"ab":4}`, `{"":3,"a":2,"aa":1,"ab":4}`},
		// U+E000 is one UTF-16 unit, above the surrogates; U+1F600 is a pair
		// starting 0xD83D, so it sorts first (RFC 8785 §3.2.3).
		{`{"\ue000":1,"\ud83d\ude00":2}`, `{"😀":2,"` + "\ue000" + `":1}`},
	}
	for _, tc := range tests {
		got, err := Transform([]byte(tc.in))
		assert.NoError(t, err, "Transform(%s)", tc.in)
		assert.Equal(t, tc.want, string(got), "Transform(%s)", tc.in)
	}
}

func TestTransformRejects(t *testing.T) {
	for _, tc := range invalid {
		got, err := Transform([]byte(tc.in))
		assert.ErrorIs(t, err, tc.want, "Transform(%.40q) = %.40q", tc.in, got)
		if tc.want != ErrTooDeep {
			_, jerr := jcs.Transform([]byte(tc.in))
			assert.Error(t, jerr, "jcs.Transform(%.40q) accepted input the test calls invalid", tc.in)
		}
	}
}

func TestErrorDoesNotEchoLongInput(t *testing.T) {
	long := `{"` + strings.Repeat("k", 10000) + `":1,"` + strings.Repeat("k", 10000) + `":2}`
	_, err := Transform([]byte(long))
	require.ErrorIs(t, err, ErrDuplicateKey)
	assert.LessOrEqual(t, len(err.Error()), 200, "the error message is truncated")
}

// decode decodes JSON as the proxy does: UseNumber, into any.
func decode(t testing.TB, in string) any {
	t.Helper()
	d := json.NewDecoder(strings.NewReader(in))
	d.UseNumber()
	var v any
	require.NoError(t, d.Decode(&v), "decode %s", in)
	return v
}

func TestMarshalMatchesTransform(t *testing.T) {
	for _, in := range corpus {
		want, err := Transform([]byte(in))
		require.NoError(t, err, "Transform(%s)", in)
		got, err := Marshal(decode(t, in))
		assert.NoError(t, err, "Marshal(decode(%s))", in)
		assert.Equal(t, string(want), string(got), "Marshal(decode(%s))", in)
	}
}

func TestMarshalTypes(t *testing.T) {
	tests := []struct {
		name string
		v    any
		want string
	}{
		{"float64", map[string]any{"t": 0.25, "big": 1e30}, `{"big":1e+30,"t":0.25}`},
		{"ints", []any{int(3), int64(-9007199254740993)}, `[3,-9007199254740992]`},
		{"raw message", json.RawMessage(` {"b":1, "a":[ 2 ]} `), `{"a":[2],"b":1}`},
		{"raw members", map[string]json.RawMessage{"z": json.RawMessage(`1.50`), "a": json.RawMessage(`{"y":1,"x":2}`)}, `{"a":{"x":2,"y":1},"z":1.5}`},
		{"raw inside any", map[string]any{"p": json.RawMessage(`[3, 2]`), "n": json.Number("1E3")}, `{"n":1000,"p":[3,2]}`},
		{"escapes", map[string]any{"\n": "\u2028<\x7f\"\\"}, `{"\n":"` + "\u2028<\x7f" + `\"\\"}`},
		{"nested maps sort independently", map[string]any{"b": map[string]any{"d": 1, "c": 2}, "a": map[string]any{"f": 3, "e": 4}}, `{"a":{"e":4,"f":3},"b":{"c":2,"d":1}}`},
	}
	for _, tc := range tests {
		got, err := Marshal(tc.v)
		assert.NoError(t, err, "%s: Marshal", tc.name)
		assert.Equal(t, tc.want, string(got), "%s: Marshal", tc.name)
	}
}

func TestMarshalRejects(t *testing.T) {
	tests := []struct {
		name string
		v    any
		want error
	}{
		{"NaN", math.NaN(), ErrNumberRange},
		{"Inf", []any{math.Inf(-1)}, ErrNumberRange},
		{"bad number text", json.Number("1.2.3"), ErrSyntax},
		{"empty number", json.Number(""), ErrSyntax},
		{"number with space", json.Number("1 "), ErrSyntax},
		{"overflowing number", json.Number("1e999"), ErrNumberRange},
		{"invalid UTF-8 string", "\xff", ErrSyntax},
		{"invalid UTF-8 name", map[string]any{"\xfe": 1}, ErrSyntax},
		{"unsupported type", struct{}{}, ErrUnsupportedType},
		{"unsupported nested", map[string]any{"a": []any{float32(1)}}, ErrUnsupportedType},
		{"raw duplicate", json.RawMessage(`{"a":1,"a":1}`), ErrDuplicateKey},
		{"raw member invalid", map[string]json.RawMessage{"a": json.RawMessage(`{`)}, ErrSyntax},
	}
	for _, tc := range tests {
		got, err := Marshal(tc.v)
		assert.ErrorIs(t, err, tc.want, "%s: Marshal = %s", tc.name, got)
	}
}

func TestCanonicalizerReuse(t *testing.T) {
	// One Canonicalizer over the whole corpus, twice, appending to a shared
	// buffer: results must not leak between calls.
	var c Canonicalizer
	var buf []byte
	for round := 0; round < 2; round++ {
		for _, in := range corpus {
			want, _ := jcs.Transform([]byte(in))
			start := len(buf)
			var err error
			buf, err = c.Append(buf, []byte(in))
			require.NoError(t, err, "round %d: Append(%s)", round, in)
			require.Equal(t, string(want), string(buf[start:]), "round %d: Append(%s)", round, in)
			_, err = c.Append(buf, []byte(`{"a":1,"a":2}`))
			require.Error(t, err, "Append of a duplicate key")
			start = len(buf)
			buf, err = c.AppendValue(buf, decode(t, in))
			require.NoError(t, err, "round %d: AppendValue(%s)", round, in)
			require.Equal(t, string(want), string(buf[start:]), "round %d: AppendValue(%s)", round, in)
		}
	}
}

func TestDeepNestingWithinLimit(t *testing.T) {
	n := MaxDepth
	in := strings.Repeat(`{"a":[`, n/2) + strings.Repeat(`]}`, n/2)
	got, err := Transform([]byte(in))
	require.NoError(t, err, "Transform of %d-deep nesting", n)
	require.True(t, string(got) == in, "Transform of %d-deep nesting changed it", n)
}
