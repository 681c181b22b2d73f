package codes

import (
	"bytes"
	"crypto/hmac"
	"crypto/sha256"
	"encoding/base32"
	"encoding/base64"
	"encoding/hex"
	"strings"
	"testing"
)

// SHA-256 examples of FIPS 180-4, as worked in NIST's "Examples with
// Intermediate Values" for SHA-256 (csrc.nist.gov, SHA256.pdf): the
// one-block message "abc" and the two-block 448-bit message. Digests from
// memory of that document, matching FIPS 180-2 Appendix B.1 and B.2.
func TestSHA256Hex(t *testing.T) {
	tests := []struct{ msg, want string }{
		{"abc", "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"},
		{"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq",
			"248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"},
	}
	for _, tc := range tests {
		if got := SHA256Hex([]byte(tc.msg)); got != tc.want {
			t.Errorf("SHA256Hex(%q) = %s, want %s", tc.msg, got, tc.want)
		}
	}
}

func unhex(t *testing.T, s string) []byte {
	t.Helper()
	b, err := hex.DecodeString(s)
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// RFC 4231 section 4, HMAC-SHA-256 rows of test cases 1-7. Values taken
// from memory of the RFC and cross-checked against published copies of
// the RFC 4231 vectors in other projects' test suites.
func TestMACRFC4231(t *testing.T) {
	aa131 := bytes.Repeat([]byte{0xaa}, 131)
	tests := []struct {
		name      string
		key, data []byte
		want      string
	}{
		{"4.2 case 1", bytes.Repeat([]byte{0x0b}, 20), []byte("Hi There"),
			"b0344c61d8db38535ca8afceaf0bf12b881dc200c9833da726e9376c2e32cff7"},
		{"4.3 case 2", []byte("Jefe"), []byte("what do ya want for nothing?"),
			"5bdcc146bf60754e6a042426089575c75a003f089d2739839dec58b964ec3843"},
		{"4.4 case 3", bytes.Repeat([]byte{0xaa}, 20), bytes.Repeat([]byte{0xdd}, 50),
			"773ea91e36800e46854db8ebd09181a72959098b3ef8c122d9635514ced565fe"},
		{"4.5 case 4", unhex(t, "0102030405060708090a0b0c0d0e0f10111213141516171819"), bytes.Repeat([]byte{0xcd}, 50),
			"82558a389a443c0ea4cc819899f2083a85f0faa3e578f8077a2e3ff46729665b"},
		// Case 5 gives only the first 128 bits of the output.
		{"4.6 case 5", bytes.Repeat([]byte{0x0c}, 20), []byte("Test With Truncation"),
			"a3b6167473100ee06e0c796c2955552b"},
		{"4.7 case 6", aa131, []byte("Test Using Larger Than Block-Size Key - Hash Key First"),
			"60e431591ee0b67f0d8a26aacbf5b77f8e0bc6213728c5140546040f0ee37f54"},
		{"4.8 case 7", aa131, []byte("This is a test using a larger than block-size key and a larger than block-size data. The key needs to be hashed before being used by the HMAC algorithm."),
			"9b09ffa71b942fcb27635fbcd5b0e944bfdc63644f0713938a7f51535c3a35e2"},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			got := MAC(tc.key, tc.data)
			if len(got) != sha256.Size {
				t.Fatalf("MAC is %d bytes, want %d", len(got), sha256.Size)
			}
			want := unhex(t, tc.want)
			if !bytes.Equal(got[:len(want)], want) {
				t.Errorf("MAC = %x, want %s", got[:len(want)], tc.want)
			}
		})
	}
}

// crockford is Crockford's base32 alphabet as his specification lists it
// (www.crockford.com/base32.html, from memory): the encoding/base32
// package with this alphabet is an independent encoder to check against.
var crockford = base32.NewEncoding("0123456789ABCDEFGHJKMNPQRSTVWXYZ")

var testSecret = []byte("fictional secret for study tests")

// Completion is the first 10 Crockford base32 characters of the HMAC of
// the documented message, computed here with crypto/hmac and
// encoding/base32 rather than the package's own encoder.
func TestCompletionMatchesIndependentEncoding(t *testing.T) {
	for _, c := range []struct{ study, rid string }{
		{"harbor-town-2031", "r-0001"},
		{"harbor-town-2031", "r-0002"},
		{"", ""},
		{"ünïcode-study", "rid with spaces"},
	} {
		m := hmac.New(sha256.New, testSecret)
		m.Write([]byte("trialogue/code/v1\x00" + c.study + "\x00" + c.rid))
		enc := crockford.EncodeToString(m.Sum(nil))[:10]
		want := enc[:5] + "-" + enc[5:]
		if got := Completion(testSecret, c.study, c.rid); got != want {
			t.Errorf("Completion(%q, %q) = %s, want %s", c.study, c.rid, got, want)
		}
	}
}

func TestCompletionShape(t *testing.T) {
	for i := range 200 {
		rid := "respondent-" + strings.Repeat("x", i%7) + string(rune('a'+i%26))
		code := Completion(testSecret, "harbor-town-2031", rid)
		if len(code) != 11 || code[5] != '-' {
			t.Fatalf("Completion = %q, want 5 characters, a hyphen, 5 characters", code)
		}
		for _, r := range code[:5] + code[6:] {
			if !strings.ContainsRune(Alphabet, r) {
				t.Fatalf("Completion = %q has %q, outside Crockford's alphabet", code, r)
			}
			if strings.ContainsRune("ILOU", r) {
				t.Fatalf("Completion = %q has excluded letter %q", code, r)
			}
		}
		if again := Completion(testSecret, "harbor-town-2031", rid); again != code {
			t.Fatalf("Completion not deterministic: %s then %s", code, again)
		}
	}
}

func TestCompletionDiffers(t *testing.T) {
	base := Completion(testSecret, "harbor-town-2031", "r-0001")
	others := map[string]string{
		"rid":    Completion(testSecret, "harbor-town-2031", "r-0002"),
		"study":  Completion(testSecret, "harbor-town-2032", "r-0001"),
		"secret": Completion([]byte("another fictional secret"), "harbor-town-2031", "r-0001"),
		// The separator keeps study and rid apart.
		"split": Completion(testSecret, "harbor-town-2031r", "-0001"),
	}
	for what, c := range others {
		if c == base {
			t.Errorf("changing the %s left the code %s unchanged", what, base)
		}
	}
}

func TestVerifyCompletion(t *testing.T) {
	const study, rid = "harbor-town-2031", "r-0042"
	code := Completion(testSecret, study, rid)
	raw := strings.ReplaceAll(code, "-", "")

	// Crockford's decoding rules: case-insensitive, hyphens ignored, O read
	// as 0, I and L read as 1.
	confuse := strings.NewReplacer("0", "O", "1", "l")
	accept := map[string]string{
		"as issued":        code,
		"lowercase":        strings.ToLower(code),
		"no hyphen":        raw,
		"spaces":           " " + raw[:3] + " " + raw[3:7] + " " + raw[7:] + " ",
		"extra hyphens":    strings.Join(strings.Split(raw, ""), "-"),
		"O for 0, l for 1": confuse.Replace(code),
		"o and I":          strings.NewReplacer("0", "o", "1", "I").Replace(code),
	}
	for name, c := range accept {
		if !VerifyCompletion(testSecret, study, rid, c) {
			t.Errorf("%s: VerifyCompletion(%q) = false for code %s", name, c, code)
		}
	}

	// Every one-character change is rejected.
	for i := range raw {
		for _, r := range Alphabet {
			if byte(r) == raw[i] {
				continue
			}
			changed := raw[:i] + string(r) + raw[i+1:]
			if VerifyCompletion(testSecret, study, rid, changed) {
				t.Fatalf("VerifyCompletion accepted %s for %s", changed, raw)
			}
		}
	}
	reject := map[string]string{
		"wrong rid":    Completion(testSecret, study, "r-0043"),
		"wrong study":  Completion(testSecret, "harbor-town-2032", rid),
		"wrong secret": Completion([]byte("another fictional secret"), study, rid),
		"truncated":    code[:len(code)-1],
		"extended":     code + "0",
		"empty":        "",
	}
	for name, c := range reject {
		if VerifyCompletion(testSecret, study, rid, c) {
			t.Errorf("%s: VerifyCompletion(%q) = true", name, c)
		}
	}
}

// Crockford's base32 decoding (www.crockford.com/base32.html, from
// memory): either case, hyphens ignored, O and o as 0, I i L l as 1; U is
// not a symbol and is not mapped to anything.
func TestNormalizeCode(t *testing.T) {
	tests := []struct{ in, want string }{
		{"7k2qd-m9xpa", "7K2QDM9XPA"},
		{" 7K2QD M9XPA ", "7K2QDM9XPA"},
		{"oO-iIlL", "001111"},
		{"uv", "UV"},
		{"", ""},
	}
	for _, tc := range tests {
		if got := NormalizeCode(tc.in); got != tc.want {
			t.Errorf("NormalizeCode(%q) = %q, want %q", tc.in, got, tc.want)
		}
	}
}

func TestNewSecret(t *testing.T) {
	a, b := NewSecret(), NewSecret()
	if len(a) != 32 || len(b) != 32 {
		t.Fatalf("secrets are %d and %d bytes, want 32", len(a), len(b))
	}
	if bytes.Equal(a, b) {
		t.Errorf("two secrets are equal: %x", a)
	}
}

// RFC 4648 section 5: base64url without padding; 24 bytes make 32
// characters.
func TestNewToken(t *testing.T) {
	const n = 10000
	seen := make(map[string]bool, n)
	for range n {
		tok := NewToken()
		if len(tok) != 32 {
			t.Fatalf("token %q has %d characters, want 32", tok, len(tok))
		}
		b, err := base64.RawURLEncoding.DecodeString(tok)
		if err != nil || len(b) != 24 {
			t.Fatalf("token %q does not decode to 24 bytes: %v", tok, err)
		}
		if seen[tok] {
			t.Fatalf("token %q drawn twice in %d draws", tok, len(seen)+1)
		}
		seen[tok] = true
	}
}
