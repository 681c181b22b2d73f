// Package codes makes the completion codes respondents carry back to their
// survey, and holds Trialogue's small hashing and random-token helpers.
//
// A completion code is derived, not stored: it is an HMAC of the study and
// respondent under a per-study secret, written in Crockford's base32 so
// that it is short, has no I, L, O or U to misread, and survives being
// typed in lowercase or read aloud.
package codes

import (
	"crypto/hmac"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/base64"
	"encoding/hex"
	"strings"
)

// Alphabet is Crockford's base32 alphabet: digits and upper-case letters
// without I, L, O and U.
const Alphabet = "0123456789ABCDEFGHJKMNPQRSTVWXYZ"

// CodeLen is the number of base32 characters in a completion code,
// not counting the hyphen: 50 bits of the MAC.
const CodeLen = 10

// codeContext separates completion-code MACs from any other use of the
// study secret.
const codeContext = "trialogue/code/v1\x00"

// SHA256Hex returns the lowercase hex SHA-256 of b.
func SHA256Hex(b []byte) string {
	sum := sha256.Sum256(b)
	return hex.EncodeToString(sum[:])
}

// MAC returns HMAC-SHA-256(key, msg).
func MAC(key, msg []byte) []byte {
	m := hmac.New(sha256.New, key)
	m.Write(msg)
	return m.Sum(nil)
}

// Completion returns the completion code of respondent rid in study: 10
// characters of Crockford base32 (alphabet 0123456789ABCDEFGHJKMNPQRSTVWXYZ,
// no I L O U) of HMAC-SHA-256(secret, "trialogue/code/v1\x00" + study +
// "\x00" + rid), shown as two groups of five joined by a hyphen, e.g.
// "7K2QD-M9XPA".
func Completion(secret []byte, study, rid string) string {
	c := rawCode(secret, study, rid)
	return c[:CodeLen/2] + "-" + c[CodeLen/2:]
}

// rawCode is the code without the hyphen: the first 50 bits of the MAC,
// most significant first, five bits per character.
func rawCode(secret []byte, study, rid string) string {
	mac := MAC(secret, []byte(codeContext+study+"\x00"+rid))
	var b [CodeLen]byte
	for i := range b {
		bit := i * 5
		// Two bytes always cover the five bits, since 50 bits < 31 bytes.
		w := uint(mac[bit/8])<<8 | uint(mac[bit/8+1])
		b[i] = Alphabet[(w>>(11-bit%8))&0x1F]
	}
	return string(b[:])
}

// VerifyCompletion reports whether code is rid's code, comparing in
// constant time (crypto/subtle) after normalising: case-insensitive,
// hyphens and spaces ignored, O→0, I and L→1 (Crockford's decoding rules).
func VerifyCompletion(secret []byte, study, rid, code string) bool {
	got := NormalizeCode(code)
	want := rawCode(secret, study, rid)
	return subtle.ConstantTimeCompare([]byte(got), []byte(want)) == 1
}

// NormalizeCode reads a code as typed the way Crockford's base32 decodes:
// letters in either case, hyphens and spaces dropped, O read as 0, I and L
// read as 1. Other characters are kept, so they fail to match.
func NormalizeCode(code string) string {
	var b strings.Builder
	b.Grow(len(code))
	for _, r := range strings.ToUpper(code) {
		switch r {
		case '-', ' ':
			continue
		case 'O':
			r = '0'
		case 'I', 'L':
			r = '1'
		}
		b.WriteRune(r)
	}
	return b.String()
}

// NewSecret returns 32 random bytes from crypto/rand.
func NewSecret() []byte {
	b := make([]byte, 32)
	// crypto/rand.Read never returns an error; it crashes the program if
	// the operating system cannot supply randomness.
	_, _ = rand.Read(b)
	return b
}

// NewToken returns a URL-safe random token of 24 bytes (192 bits) in
// base64url without padding: 32 characters.
func NewToken() string {
	b := make([]byte, 24)
	_, _ = rand.Read(b) // never fails; see NewSecret
	return base64.RawURLEncoding.EncodeToString(b)
}
