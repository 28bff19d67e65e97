package canon

import (
	"math"
	"strconv"
	"testing"

	"github.com/gowebpki/jcs"
	"github.com/stretchr/testify/assert"
	"github.com/stretchr/testify/require"
)

// Check values from outside the project. TestReferenceTestdata reads the
// input and output files of the reference implementation's test data
// (shipped in the github.com/gowebpki/jcs module, a port of the RFC
// author's reference code, whose testdata README describes the files):
// its "values" pair is RFC 8785's §3.2.2-§3.2.4 sample object, with the
// UTF-8 bytes of §3.2.4 in outhex, and "weird" is a sorting sample that
// holds the §3.2.3 cases (a surrogate pair sorting before U+FB33).
// The RFC's own text is not at hand here, so the Appendix B numbers below
// are written from memory; six of them are also the number vectors of that
// module's es6numfmt_test.go, and each is cross-checked against
// gowebpki/jcs, an independent implementation.

// RFC 8785 Appendix B: IEEE-754 bit patterns and their ECMAScript text
// (from memory). An empty want marks NaN and Infinity, which have no JSON
// form and must be rejected.
var appendixB = []struct {
	bits string
	want string
}{
	{"0000000000000000", "0"},
	{"8000000000000000", "0"}, // minus zero
	{"0000000000000001", "5e-324"},
	{"8000000000000001", "-5e-324"},
	{"7fefffffffffffff", "1.7976931348623157e+308"},
	{"ffefffffffffffff", "-1.7976931348623157e+308"},
	{"4340000000000000", "9007199254740992"},
	{"c340000000000000", "-9007199254740992"},
	{"4430000000000000", "295147905179352830000"},
	{"7fffffffffffffff", ""}, // NaN
	{"7ff0000000000000", ""}, // Infinity
	{"44b52d02c7e14af5", "9.999999999999997e+22"},
	{"44b52d02c7e14af6", "1e+23"},
	{"44b52d02c7e14af7", "1.0000000000000001e+23"},
	{"444b1ae4d6e2ef4e", "999999999999999700000"},
	{"444b1ae4d6e2ef4f", "999999999999999900000"},
	{"444b1ae4d6e2ef50", "1e+21"},
	{"3eb0c6f7a0b5ed8c", "9.999999999999997e-7"},
	{"3eb0c6f7a0b5ed8d", "0.000001"},
	{"41b3de4355555553", "333333333.3333332"},
	{"41b3de4355555554", "333333333.33333325"},
	{"41b3de4355555555", "333333333.3333333"},
	{"41b3de4355555556", "333333333.3333334"},
	{"41b3de4355555557", "333333333.33333343"},
	{"becbf647612f3696", "-0.0000033333333333333333"},
	{"43143ff3c1cb0959", "1424953923781206.2"},
}

func TestRFC8785AppendixBNumbers(t *testing.T) {
	for _, tc := range appendixB {
		t.Run(tc.bits, func(t *testing.T) {
			u, err := strconv.ParseUint(tc.bits, 16, 64)
			require.NoError(t, err)
			f := math.Float64frombits(u)
			got, err := Marshal(f)
			if tc.want == "" {
				require.Error(t, err, "Marshal(%v) = %s (RFC 8785 Appendix B: no JSON form)", f, got)
				return
			}
			require.NoError(t, err, "Marshal(%v)", f)
			assert.Equal(t, tc.want, string(got), "Marshal(%#x) (RFC 8785 Appendix B)", u)
			ref, err := jcs.Transform([]byte(strconv.FormatFloat(f, 'g', -1, 64)))
			assert.NoError(t, err, "gowebpki/jcs on %#x", u)
			assert.Equal(t, tc.want, string(ref), "gowebpki/jcs writes %#x otherwise than the table", u)
			// The canonical text is a fixed point of Transform.
			again, err := Transform([]byte(tc.want))
			assert.NoError(t, err, "Transform(%s)", tc.want)
			assert.Equal(t, tc.want, string(again), "Transform(%s) leaves it unchanged", tc.want)
			// And the shortest round-trip text of f, as strconv writes it,
			// canonicalizes to the same text.
			viaText, err := Transform([]byte(strconv.FormatFloat(f, 'g', -1, 64)))
			assert.NoError(t, err, "Transform(%s)", strconv.FormatFloat(f, 'g', -1, 64))
			assert.Equal(t, tc.want, string(viaText), "Transform(%s)", strconv.FormatFloat(f, 'g', -1, 64))
		})
	}
}

// RFC 8785 §3.2.2.2: only '"', '\' and U+0000-U+001F are escaped, the five
// with short forms use them, the rest use lowercase \u00xx; U+007F, '/',
// HTML characters and U+2028/U+2029 are written as they are.
func TestRFC8785StringEscaping(t *testing.T) {
	tests := []struct {
		in, want string
	}{
		{`"\u0000"`, `"\u0000"`},
		{`"\u001F"`, `"\u001f"`},
		{`"\u001f"`, `"\u001f"`},
		{`"\b\f\n\r\t"`, `"\b\f\n\r\t"`},
		{`"\u0008\u000C\u000A\u000D\u0009"`, `"\b\f\n\r\t"`},
		{`"\u000b"`, `"\u000b"`},
		{`"\""`, `"\""`},
		{`"\\"`, `"\\"`},
		{`"\/"`, `"/"`},
		{`"\u007f"`, "\"\u007f\""},
		{`"\u2028\u2029"`, "\"\u2028\u2029\""},
		{`"<>&'"`, `"<>&'"`},
		{`"\u003c\u003E\u0026"`, `"<>&"`},
		{`"\u00e9"`, `"é"`},
		{`"\ud83d\ude00"`, `"😀"`},
		{`"😀"`, `"😀"`},
		{`"\uFFFF"`, "\"\uffff\""},
	}
	for _, tc := range tests {
		got, err := Transform([]byte(tc.in))
		if assert.NoError(t, err, "Transform(%s)", tc.in) {
			assert.Equal(t, tc.want, string(got), "Transform(%s)", tc.in)
		}
	}
}
