package canon

import (
	"bytes"
	"crypto/sha256"
	"encoding/binary"
	"encoding/hex"
	"encoding/json"
	"errors"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// jcsDir holds the RFC 8785 test data published with the scheme's reference
// implementations (cyberphone/json-canonicalization, testdata/, Apache-2.0);
// see its SOURCE.md.
const jcsDir = "../../testdata/reference/jcs"

func jcsNames(t testing.TB) []string {
	t.Helper()
	paths, err := filepath.Glob(filepath.Join(jcsDir, "input", "*.json"))
	if err != nil {
		t.Fatal(err)
	}
	if len(paths) == 0 {
		t.Fatalf("no inputs in %s/input", jcsDir)
	}
	names := make([]string, len(paths))
	for i, p := range paths {
		names[i] = strings.TrimSuffix(filepath.Base(p), ".json")
	}
	return names
}

func readJCS(t testing.TB, parts ...string) []byte {
	t.Helper()
	b, err := os.ReadFile(filepath.Join(append([]string{jcsDir}, parts...)...))
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// Every input/NAME.json canonicalizes to output/NAME.json byte for byte,
// whose bytes are also given in outhex/NAME.txt (cyberphone/json-canonicalization
// testdata, per testdata/reference/jcs/SOURCE.md).
func TestTransformReference(t *testing.T) {
	for _, name := range jcsNames(t) {
		t.Run(name, func(t *testing.T) {
			in := readJCS(t, "input", name+".json")
			want := readJCS(t, "output", name+".json")
			wantHex, err := hex.DecodeString(strings.Join(strings.Fields(string(readJCS(t, "outhex", name+".txt"))), ""))
			if err != nil {
				t.Fatalf("outhex/%s.txt: %v", name, err)
			}
			if !bytes.Equal(want, wantHex) {
				t.Fatalf("output/%s.json and outhex/%s.txt disagree", name, name)
			}
			got, err := Transform(in)
			if err != nil {
				t.Fatalf("Transform: %v", err)
			}
			if !bytes.Equal(got, want) {
				t.Errorf("Transform(input/%s.json)\n got %s\nwant %s", name, got, want)
			}
		})
	}
}

// Decoding a reference input into Go values and hashing it with SHA256 gives
// the SHA-256 of the reference canonical output (cyberphone testdata).
func TestSHA256Reference(t *testing.T) {
	for _, name := range jcsNames(t) {
		t.Run(name, func(t *testing.T) {
			var v any
			if err := json.Unmarshal(readJCS(t, "input", name+".json"), &v); err != nil {
				t.Fatal(err)
			}
			sum := sha256.Sum256(readJCS(t, "output", name+".json"))
			got, err := SHA256(v)
			if err != nil {
				t.Fatalf("SHA256: %v", err)
			}
			if want := hex.EncodeToString(sum[:]); got != want {
				t.Errorf("SHA256 = %s, want %s", got, want)
			}
		})
	}
}

// rfc8785AppendixB is the number serialization table of RFC 8785 Appendix B:
// IEEE-754 double bits in hex and the expected JSON text. Checked against
// published copies of the table in other JCS test suites; "" marks the rows
// the RFC says must raise an error (NaN and Infinity).
var rfc8785AppendixB = []struct{ bits, want string }{
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

func doubleFromHex(t *testing.T, h string) float64 {
	t.Helper()
	b, err := hex.DecodeString(h)
	if err != nil || len(b) != 8 {
		t.Fatalf("bad hex %q", h)
	}
	return math.Float64frombits(binary.BigEndian.Uint64(b))
}

// RFC 8785 Appendix B, through the number formatter and, for the finite
// rows, through Transform of a JSON text that reads back as the same double.
func TestNumbersAppendixB(t *testing.T) {
	for _, tc := range rfc8785AppendixB {
		t.Run(tc.bits, func(t *testing.T) {
			f := doubleFromHex(t, tc.bits)
			got, err := formatNumber(f)
			if tc.want == "" {
				// RFC 8785 section 3.2.2.3: NaN and Infinity must cause an error.
				if !errors.Is(err, ErrNumber) {
					t.Fatalf("formatNumber(%v) = %q, %v; want ErrNumber", f, got, err)
				}
				return
			}
			if err != nil || got != tc.want {
				t.Fatalf("formatNumber(%v) = %q, %v; want %q", f, got, err, tc.want)
			}
			// Go's shortest round-trip text of f is valid JSON that parses to f.
			text := strconv.FormatFloat(f, 'g', -1, 64)
			out, err := Transform([]byte("[" + text + "]"))
			if err != nil || string(out) != "["+tc.want+"]" {
				t.Errorf("Transform([%s]) = %s, %v; want [%s]", text, out, err, tc.want)
			}
		})
	}
}

// RFC 8785 section 3.2.3 example: names sorted by UTF-16 code units, so
// U+1F600 (D83D DE00) comes before U+FB33 although its code point is higher.
// The expected order is the one the section lists; entered from memory of
// the RFC text and consistent with weird.json in the reference data.
func TestSortingExample(t *testing.T) {
	in := `{
  "\u20ac": "Euro Sign",
  "\r": "Carriage Return",
  "\ufb33": "Hebrew Letter Dalet With Dagesh",
  "1": "One",
  "\ud83d\ude00": "Emoji: Grinning Face",
  "\u0080": "Control",
  "\u00f6": "Latin Small Letter O With Diaeresis"
}`
	wantOrder := []string{
		"Carriage Return",
		"One",
		"Control",
		"Latin Small Letter O With Diaeresis",
		"Euro Sign",
		"Emoji: Grinning Face",
		"Hebrew Letter Dalet With Dagesh",
	}
	out, err := Transform([]byte(in))
	if err != nil {
		t.Fatal(err)
	}
	dec := json.NewDecoder(bytes.NewReader(out))
	if _, err := dec.Token(); err != nil { // the opening brace
		t.Fatal(err)
	}
	var got []string
	for dec.More() {
		if _, err := dec.Token(); err != nil { // the member name
			t.Fatal(err)
		}
		var v string
		if err := dec.Decode(&v); err != nil {
			t.Fatal(err)
		}
		got = append(got, v)
	}
	if strings.Join(got, "|") != strings.Join(wantOrder, "|") {
		t.Errorf("member order\n got %q\nwant %q\noutput %s", got, wantOrder, out)
	}
}

// RFC 8785 section 3.2.2.2: only ", \ and control characters are escaped;
// \b \f \n \r \t use their short forms, the other controls \u00xx in
// lowercase hex, and everything else (including / and non-ASCII) is
// written as UTF-8.
func TestStringEscapes(t *testing.T) {
	tests := []struct{ in, want string }{
		{`"\u0008\u000c\u000a\u000d\u0009"`, `"\b\f\n\r\t"`},
		{`"\u0000\u001F\u007f"`, "\"\\u0000\\u001f\x7f\""},
		{`"\/\"\\"`, `"/\"\\"`},
		{`"\u00e9\u4e2d\ud83d\ude00"`, `"é中😀"`},
		{`"<&>"`, `"<&>"`},
	}
	for _, tc := range tests {
		got, err := Transform([]byte(tc.in))
		if err != nil || string(got) != tc.want {
			t.Errorf("Transform(%s) = %s, %v; want %s", tc.in, got, err, tc.want)
		}
	}
}

// RFC 8259 section 2: whitespace may surround the value and tokens;
// RFC 8785 section 3.2.1 removes it.
func TestWhitespaceAndLiterals(t *testing.T) {
	got, err := Transform([]byte(" \t\n[ true , false ,null, { } ,[ ] ]\r\n"))
	if err != nil || string(got) != `[true,false,null,{},[]]` {
		t.Errorf("Transform = %s, %v", got, err)
	}
}

func TestTransformErrors(t *testing.T) {
	tests := []struct {
		name string
		in   string
		is   error // a sentinel the error must wrap, or nil for plain syntax errors
		says string
	}{
		// RFC 7493 section 2.3: member names must be unique, compared after unescaping.
		{"duplicate", `{"a":1,"b":2,"a":3}`, ErrDuplicateName, `"a"`},
		{"duplicate escaped", `{"ab":1,"\u0061b":2}`, ErrDuplicateName, `"ab"`},
		{"duplicate nested", `[{"x":{"k":1,"k":1}}]`, ErrDuplicateName, `"k"`},
		// RFC 7493 section 2.1: UTF-8 only, no unpaired surrogates.
		{"invalid UTF-8", "\"caf\xe9\"", ErrInvalidUnicode, ""},
		{"invalid UTF-8 in name", "{\"\xff\":1}", ErrInvalidUnicode, ""},
		{"overlong UTF-8", "\"\xc0\xaf\"", ErrInvalidUnicode, ""},
		{"lone high surrogate", `"\ud800"`, ErrInvalidUnicode, ""},
		{"high then non-low", `"\ud800\u0041"`, ErrInvalidUnicode, ""},
		{"lone low surrogate", `"x\udc00"`, ErrInvalidUnicode, ""},
		// RFC 7493 section 2.2 and RFC 8785 section 3.2.2.3: numbers must be doubles.
		{"too large", `[1e400]`, ErrNumber, "1e400"},
		{"too small", `[-1.8e308]`, ErrNumber, ""},
		// RFC 8259 section 2: JSON-text = ws value ws.
		{"trailing garbage", `{"a":1} x`, ErrTrailingData, ""},
		{"second value", `{}{}`, ErrTrailingData, ""},
		{"two numbers", `1 2`, ErrTrailingData, ""},
		{"extra close", `[1]]`, ErrTrailingData, ""},
		// RFC 8259 sections 2-7: not JSON at all.
		{"empty", ``, nil, ""},
		{"unclosed", `[1,2`, nil, ""},
		{"trailing comma", `[1,]`, nil, ""},
		{"trailing comma in object", `{"a":1,}`, nil, ""},
		{"missing colon", `{"a" 1}`, nil, ""},
		{"single quotes", `{'a':1}`, nil, ""},
		{"NaN literal", `[NaN]`, nil, ""},
		{"leading zero", `[01]`, nil, ""},
		{"bad escape", `"\x"`, nil, ""},
		{"raw control", "\"a\nb\"", nil, ""},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got, err := Transform([]byte(tc.in))
			if err == nil {
				t.Fatalf("Transform(%q) = %s, want an error", tc.in, got)
			}
			if tc.is != nil && !errors.Is(err, tc.is) {
				t.Errorf("error %v does not wrap %v", err, tc.is)
			}
			if !strings.Contains(err.Error(), tc.says) {
				t.Errorf("error %q does not name %s", err, tc.says)
			}
		})
	}
}

func TestTooDeep(t *testing.T) {
	deep := strings.Repeat("[", MaxDepth+1) + strings.Repeat("]", MaxDepth+1)
	if _, err := Transform([]byte(deep)); !errors.Is(err, ErrTooDeep) {
		t.Errorf("nesting %d: err = %v, want ErrTooDeep", MaxDepth+1, err)
	}
	ok := strings.Repeat("[", MaxDepth) + strings.Repeat("]", MaxDepth)
	if out, err := Transform([]byte(ok)); err != nil || string(out) != ok {
		t.Errorf("nesting %d: err = %v", MaxDepth, err)
	}
}

// NaN and infinities have no JSON form (RFC 8259 section 6; RFC 8785
// section 3.2.2.3), so Marshal and SHA256 fail on them.
func TestMarshalNotRepresentable(t *testing.T) {
	for _, v := range []any{math.NaN(), math.Inf(1), map[string]float64{"x": math.Inf(-1)}} {
		if b, err := Marshal(v); err == nil {
			t.Errorf("Marshal(%v) = %s, want an error", v, b)
		}
		if h, err := SHA256(v); err == nil {
			t.Errorf("SHA256(%v) = %s, want an error", v, h)
		}
	}
}

// Marshal orders struct fields by name and drops encoding/json's HTML
// escaping, which RFC 8785 section 3.2.2.2 does not allow.
func TestMarshal(t *testing.T) {
	type arm struct {
		Zeta  string  `json:"zeta"`
		Alpha float64 `json:"alpha"`
		Code  string  `json:"code"`
	}
	got, err := Marshal(arm{Zeta: "<b>&</b>", Alpha: 1e21, Code: "A3"})
	if err != nil {
		t.Fatal(err)
	}
	// Expected by RFC 8785 sections 3.2.3 (order), 3.2.2.2 (no escaping of
	// < & >) and Appendix B (1e21 is written "1e+21").
	if want := `{"alpha":1e+21,"code":"A3","zeta":"<b>&</b>"}`; string(got) != want {
		t.Errorf("Marshal = %s, want %s", got, want)
	}
}
