package canon

import (
	"encoding/hex"
	"math"
	"strconv"
	"strings"
	"testing"
)

// The check values in this file come from RFC 8785, cited by section beside
// each. They are written from memory; the §3.2.2-§3.2.4 example also matches
// the sample in the github.com/gowebpki/jcs README, and every value is
// additionally cross-checked against gowebpki/jcs in canon_test.go.

// RFC 8785 §3.2.2 (primitive serialization), §3.2.3 (sorting) and §3.2.4 (UTF-8
// generation): the sample object, its canonical form and that form's UTF-8 hex.
func TestRFC8785SampleObject(t *testing.T) {
	input := `{
  "numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],
  "string": "\u20ac$\u000F\u000aA'\u0042\u0022\u005c\\\"\/",
  "literals": [null, true, false]
}`
	// RFC 8785 §3.2.3 (from memory).
	want := `{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],"string":"€$\u000f\nA'B\"\\\\\"/"}`
	// RFC 8785 §3.2.4 (from memory).
	wantHex := `7b 22 6c 69 74 65 72 61 6c 73 22 3a 5b 6e 75 6c 6c 2c 74 72
75 65 2c 66 61 6c 73 65 5d 2c 22 6e 75 6d 62 65 72 73 22 3a
5b 33 33 33 33 33 33 33 33 33 2e 33 33 33 33 33 33 33 2c 31
65 2b 33 30 2c 34 2e 35 2c 30 2e 30 30 32 2c 31 65 2d 32 37
5d 2c 22 73 74 72 69 6e 67 22 3a 22 e2 82 ac 24 5c 75 30 30
30 66 5c 6e 41 27 42 5c 22 5c 5c 5c 5c 5c 22 2f 22 7d`
	got, err := Transform([]byte(input))
	if err != nil {
		t.Fatalf("Transform: %v", err)
	}
	if string(got) != want {
		t.Errorf("Transform:\n got %s\nwant %s", got, want)
	}
	wantBytes, err := hex.DecodeString(strings.Join(strings.Fields(wantHex), ""))
	if err != nil {
		t.Fatal(err)
	}
	if string(got) != string(wantBytes) {
		t.Errorf("UTF-8 bytes:\n got % x\nwant % x", got, wantBytes)
	}
}

// RFC 8785 §3.2.3: members sorted by UTF-16 code units, including a
// surrogate pair (U+1F600) that sorts before U+FB33 although its code point is
// larger.
func TestRFC8785Sorting(t *testing.T) {
	input := `{
  "\u20ac": "Euro Sign",
  "\r": "Carriage Return",
  "\ufb33": "Hebrew Letter Dalet With Dagesh",
  "1": "One",
  "\ud83d\ude00": "Emoji: Grinning Face",
  "\u0080": "Control",
  "\u00f6": "Latin Small Letter O With Diaeresis"
}`
	// RFC 8785 §3.2.3, the expected order of the values (from memory).
	wantOrder := []string{
		"Carriage Return",
		"One",
		"Control",
		"Latin Small Letter O With Diaeresis",
		"Euro Sign",
		"Emoji: Grinning Face",
		"Hebrew Letter Dalet With Dagesh",
	}
	got, err := Transform([]byte(input))
	if err != nil {
		t.Fatalf("Transform: %v", err)
	}
	want := `{"\r":"Carriage Return","1":"One","` + "\u0080" + `":"Control","` + "\u00f6" + `":"Latin Small Letter O With Diaeresis","` +
		"\u20ac" + `":"Euro Sign","` + "\U0001F600" + `":"Emoji: Grinning Face","` + "\ufb33" + `":"Hebrew Letter Dalet With Dagesh"}`
	if string(got) != want {
		t.Errorf("Transform:\n got %s\nwant %s", got, want)
	}
	last := -1
	for _, v := range wantOrder {
		i := strings.Index(string(got), `"`+v+`"`)
		if i <= last {
			t.Errorf("value %q at offset %d, want after offset %d", v, i, last)
		}
		last = i
	}
}

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
			if err != nil {
				t.Fatal(err)
			}
			f := math.Float64frombits(u)
			got, err := Marshal(f)
			if tc.want == "" {
				if err == nil {
					t.Fatalf("Marshal(%v) = %s, want an error (RFC 8785 Appendix B: no JSON form)", f, got)
				}
				return
			}
			if err != nil {
				t.Fatalf("Marshal(%v): %v", f, err)
			}
			if string(got) != tc.want {
				t.Errorf("Marshal(%#x) = %s, want %s (RFC 8785 Appendix B)", u, got, tc.want)
			}
			// The canonical text is a fixed point of Transform.
			again, err := Transform([]byte(tc.want))
			if err != nil || string(again) != tc.want {
				t.Errorf("Transform(%s) = %s, %v; want it unchanged", tc.want, again, err)
			}
			// And the shortest round-trip text of f, as strconv writes it,
			// canonicalizes to the same text.
			viaText, err := Transform([]byte(strconv.FormatFloat(f, 'g', -1, 64)))
			if err != nil || string(viaText) != tc.want {
				t.Errorf("Transform(%s) = %s, %v; want %s", strconv.FormatFloat(f, 'g', -1, 64), viaText, err, tc.want)
			}
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
		if err != nil {
			t.Errorf("Transform(%s): %v", tc.in, err)
			continue
		}
		if string(got) != tc.want {
			t.Errorf("Transform(%s) = %s, want %s", tc.in, got, tc.want)
		}
	}
}
