package canon

import (
	"encoding/json"
	"testing"

	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// RFC 8785 §3.2.2.3 serializes every JSON number as ECMAScript writes the
// IEEE-754 double nearest to it, and its Appendix B lists what that gives
// for integers a double cannot hold all of: bit pattern 4340000000000000 is
// written "9007199254740992" (2^53) and 4430000000000000
// "295147905179352830000" (2^68 = 295147905179352825856). So under RFC 8785
// alone the integer literals 9007199254740992 and 9007199254740993, or
// 295147905179352825856 and 295147905179352830000, canonicalize to the same
// text. RFC 7493 §2.2 (the I-JSON rule RFC 8785 §3.1 requires) names the
// range an integer is exact in: [-(2^53)+1, 2^53-1]. With ExactIntegers set,
// integer literals outside that range keep their own digits.
func TestExactIntegersKeepWhatDoublesLose(t *testing.T) {
	tests := []struct {
		name    string
		in      string
		rfc8785 string // RFC 8785's text (Appendix B where it lists the value)
		exact   string // with ExactIntegers
	}{
		{"2^53-1, the last exact integer (RFC 7493 §2.2)", "9007199254740991", "9007199254740991", "9007199254740991"},
		{"-(2^53-1)", "-9007199254740991", "-9007199254740991", "-9007199254740991"},
		{"2^53 (Appendix B 4340000000000000)", "9007199254740992", "9007199254740992", "9007199254740992"},
		{"2^53+1 rounds to 2^53", "9007199254740993", "9007199254740992", "9007199254740993"},
		{"-(2^53+1)", "-9007199254740993", "-9007199254740992", "-9007199254740993"},
		{"2^68 exactly (Appendix B 4430000000000000)", "295147905179352825856", "295147905179352830000", "295147905179352825856"},
		{"Appendix B's text of 2^68 as an integer literal", "295147905179352830000", "295147905179352830000", "295147905179352830000"},
		{"int64 max", "9223372036854775807", "9223372036854776000", "9223372036854775807"},
		{"beyond 1e21", "1000000000000000000000001", "1e+24", "1000000000000000000000001"},
		// A fraction or an exponent makes the number a double on every
		// reader, so RFC 8785's text is its meaning.
		{"fraction", "9007199254740993.0", "9007199254740992", "9007199254740992"},
		{"exponent", "9.007199254740993e15", "9007199254740992", "9007199254740992"},
		{"small integers stay", "42", "42", "42"},
		{"minus zero", "-0", "0", "0"},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			got, err := Transform([]byte(tt.in))
			require.NoError(t, err)
			assert.Equal(t, tt.rfc8785, string(got), "RFC 8785 text")

			exact := Canonicalizer{ExactIntegers: true}
			got, err = exact.Append(nil, []byte(`{"seed":`+tt.in+`}`))
			require.NoError(t, err)
			assert.Equal(t, `{"seed":`+tt.exact+`}`, string(got), "Append with ExactIntegers")

			got, err = exact.AppendValue(nil, map[string]any{"seed": json.Number(tt.in)})
			require.NoError(t, err)
			assert.Equal(t, `{"seed":`+tt.exact+`}`, string(got), "AppendValue of a json.Number with ExactIntegers")

			got, err = exact.AppendValue(nil, map[string]json.RawMessage{"seed": json.RawMessage(tt.in)})
			require.NoError(t, err)
			assert.Equal(t, `{"seed":`+tt.exact+`}`, string(got), "AppendValue of raw JSON with ExactIntegers")
		})
	}
}

// The integers RFC 8785 merges stay apart with ExactIntegers, in any
// position of a document, and an int64 handed to AppendValue keeps its value.
func TestExactIntegersSeparateWhatRFC8785Merges(t *testing.T) {
	pairs := [][2]string{
		{`{"seed":9007199254740992}`, `{"seed":9007199254740993}`},
		{`[9007199254740993, 9007199254740992.0]`, `[9007199254740992.0, 9007199254740993]`},
		{`{"a":[295147905179352825856]}`, `{"a":[295147905179352830000]}`},
	}
	exact := Canonicalizer{ExactIntegers: true}
	for _, p := range pairs {
		a, err := Transform([]byte(p[0]))
		require.NoError(t, err)
		b, err := Transform([]byte(p[1]))
		require.NoError(t, err)
		assert.Equal(t, string(a), string(b), "RFC 8785 merges %s and %s", p[0], p[1])

		a, err = exact.Append(nil, []byte(p[0]))
		require.NoError(t, err)
		b, err = exact.Append(nil, []byte(p[1]))
		require.NoError(t, err)
		assert.NotEqual(t, string(a), string(b), "ExactIntegers keeps %s and %s apart", p[0], p[1])
	}
	got, err := exact.AppendValue(nil, []any{int64(9007199254740993), 9007199254740993})
	require.NoError(t, err)
	assert.Equal(t, `[9007199254740993,9007199254740993]`, string(got))
	got, err = (&Canonicalizer{}).AppendValue(nil, []any{int64(9007199254740993)})
	require.NoError(t, err)
	assert.Equal(t, `[9007199254740992]`, string(got), "without ExactIntegers an int64 is the nearest double")
}
