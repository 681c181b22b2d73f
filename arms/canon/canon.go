// Package canon writes JSON documents in the canonical form of RFC 8785,
// the JSON Canonicalization Scheme (JCS).
//
// Trialogue identifies a study version by the SHA-256 of its canonical JSON,
// so two study files that differ only in member order, whitespace, string
// escapes or number spelling hash the same. The input must be I-JSON
// (RFC 7493), as RFC 8785 section 3.1 requires: valid UTF-8 with no lone
// surrogates, no duplicate member names, and numbers that fit an IEEE-754
// double.
package canon

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math"
	"slices"
	"strconv"
	"strings"
	"unicode/utf16"
	"unicode/utf8"
)

// Errors for documents that are valid JSON but not I-JSON, or that carry
// more than one value. Transform wraps them; test with errors.Is.
var (
	// ErrDuplicateName reports an object with two members of the same name.
	ErrDuplicateName = errors.New("duplicate member name")
	// ErrInvalidUnicode reports invalid UTF-8 or a lone surrogate escape.
	ErrInvalidUnicode = errors.New("string is not valid Unicode")
	// ErrNumber reports a number that no IEEE-754 double represents
	// (outside the double range, NaN or an infinity).
	ErrNumber = errors.New("number is not representable as an IEEE-754 double")
	// ErrTrailingData reports anything but whitespace after the value.
	ErrTrailingData = errors.New("data after the JSON value")
	// ErrTooDeep reports nesting deeper than MaxDepth.
	ErrTooDeep = errors.New("JSON nesting too deep")
)

// MaxDepth is the deepest nesting of arrays and objects Transform accepts.
const MaxDepth = 10000

// Transform returns the RFC 8785 canonical form of a JSON document.
func Transform(doc []byte) ([]byte, error) {
	p := &parser{doc: doc, dec: json.NewDecoder(bytes.NewReader(doc))}
	p.dec.UseNumber()
	root, err := p.value()
	if err != nil {
		return nil, err
	}
	switch tok, err := p.dec.Token(); {
	case errors.Is(err, io.EOF):
		return root.write(make([]byte, 0, len(doc))), nil
	case err != nil:
		return nil, fmt.Errorf("canon: %w: %w", ErrTrailingData, err)
	default:
		return nil, fmt.Errorf("canon: %w: %v at offset %d", ErrTrailingData, tok, p.dec.InputOffset())
	}
}

// Marshal encodes v with encoding/json and canonicalizes the result.
func Marshal(v any) ([]byte, error) {
	doc, err := json.Marshal(v)
	if err != nil {
		return nil, fmt.Errorf("canon: encoding %T: %w", v, err)
	}
	return Transform(doc)
}

// SHA256 returns the lowercase hex SHA-256 of the canonical form of v.
func SHA256(v any) (string, error) {
	b, err := Marshal(v)
	if err != nil {
		return "", err
	}
	sum := sha256.Sum256(b)
	return hex.EncodeToString(sum[:]), nil
}

// parser walks the decoder's token stream and appends canonical bytes.
type parser struct {
	doc   []byte
	dec   *json.Decoder
	depth int
}

// token reads the next token and, for strings, checks the raw bytes the
// decoder consumed: encoding/json silently turns invalid UTF-8 and lone
// surrogates into U+FFFD, which I-JSON forbids.
func (p *parser) token() (json.Token, error) {
	start := p.dec.InputOffset()
	tok, err := p.dec.Token()
	if err != nil {
		if errors.Is(err, io.EOF) {
			err = io.ErrUnexpectedEOF
		}
		return nil, fmt.Errorf("canon: %w", err)
	}
	if _, ok := tok.(string); ok {
		end := p.dec.InputOffset()
		if err := checkRawString(p.doc[start:end]); err != nil {
			return nil, fmt.Errorf("canon: string at offset %d: %w", start, err)
		}
	}
	return tok, nil
}

// node is a parsed JSON value: scalars hold their canonical text, arrays
// their elements, objects their members already sorted. Building the tree
// first and writing it once keeps the work linear in the document's size
// however deep it nests.
type node struct {
	text    []byte   // canonical form of a string, number or literal
	array   bool     // an array, of elems
	object  bool     // an object, of members
	elems   []*node  // array elements in order
	members []member // object members sorted by name
}

type member struct {
	name  string
	units []uint16 // the name in UTF-16 code units, the sort key
	value *node
}

func (n *node) write(dst []byte) []byte {
	switch {
	case n.array:
		dst = append(dst, '[')
		for i, e := range n.elems {
			if i > 0 {
				dst = append(dst, ',')
			}
			dst = e.write(dst)
		}
		return append(dst, ']')
	case n.object:
		dst = append(dst, '{')
		for i, m := range n.members {
			if i > 0 {
				dst = append(dst, ',')
			}
			dst = appendString(dst, m.name)
			dst = append(dst, ':')
			dst = m.value.write(dst)
		}
		return append(dst, '}')
	}
	return append(dst, n.text...)
}

func (p *parser) value() (*node, error) {
	tok, err := p.token()
	if err != nil {
		return nil, err
	}
	switch t := tok.(type) {
	case json.Delim:
		switch t {
		case '{':
			return p.object()
		case '[':
			return p.array()
		}
		return nil, fmt.Errorf("canon: unexpected %q at offset %d", t, p.dec.InputOffset())
	case string:
		return &node{text: appendString(nil, t)}, nil
	case json.Number:
		text, err := appendNumber(nil, string(t))
		if err != nil {
			return nil, err
		}
		return &node{text: text}, nil
	case bool:
		return &node{text: strconv.AppendBool(nil, t)}, nil
	case nil:
		return &node{text: []byte("null")}, nil
	}
	return nil, fmt.Errorf("canon: unexpected token %v", tok)
}

func (p *parser) enter() error {
	p.depth++
	if p.depth > MaxDepth {
		return fmt.Errorf("canon: more than %d levels: %w", MaxDepth, ErrTooDeep)
	}
	return nil
}

func (p *parser) array() (*node, error) {
	if err := p.enter(); err != nil {
		return nil, err
	}
	n := &node{array: true}
	for p.dec.More() {
		e, err := p.value()
		if err != nil {
			return nil, err
		}
		n.elems = append(n.elems, e)
	}
	if err := p.close(']'); err != nil {
		return nil, err
	}
	p.depth--
	return n, nil
}

func (p *parser) object() (*node, error) {
	if err := p.enter(); err != nil {
		return nil, err
	}
	n := &node{object: true}
	seen := make(map[string]bool)
	for p.dec.More() {
		tok, err := p.token()
		if err != nil {
			return nil, err
		}
		name, ok := tok.(string)
		if !ok {
			return nil, fmt.Errorf("canon: member name expected, got %v", tok)
		}
		if seen[name] {
			return nil, fmt.Errorf("canon: %w %q", ErrDuplicateName, name)
		}
		seen[name] = true
		v, err := p.value()
		if err != nil {
			return nil, err
		}
		n.members = append(n.members, member{name: name, units: utf16.Encode([]rune(name)), value: v})
	}
	if err := p.close('}'); err != nil {
		return nil, err
	}
	p.depth--
	// RFC 8785 section 3.2.3: sort by the names' UTF-16 code units.
	slices.SortFunc(n.members, func(a, b member) int { return slices.Compare(a.units, b.units) })
	return n, nil
}

func (p *parser) close(want json.Delim) error {
	tok, err := p.token()
	if err != nil {
		return err
	}
	if tok != want {
		return fmt.Errorf("canon: expected %q, got %v", want, tok)
	}
	return nil
}

// checkRawString checks the raw bytes of one string token (possibly after
// separators and whitespace): valid UTF-8, and every \u escape of a
// surrogate is a high surrogate followed by an escaped low one.
func checkRawString(raw []byte) error {
	if !utf8.Valid(raw) {
		return fmt.Errorf("invalid UTF-8: %w", ErrInvalidUnicode)
	}
	for i := 0; i < len(raw); i++ {
		if raw[i] != '\\' {
			continue
		}
		i++ // the escaped character; a backslash here is skipped too
		if i >= len(raw) || raw[i] != 'u' {
			continue
		}
		r, ok := hex4(raw[i+1:])
		if !ok {
			continue // the decoder rejects a bad escape itself
		}
		i += 4
		switch {
		case r >= 0xDC00 && r <= 0xDFFF:
			return fmt.Errorf("lone low surrogate \\u%04x: %w", r, ErrInvalidUnicode)
		case r >= 0xD800 && r <= 0xDBFF:
			if i+6 >= len(raw) || raw[i+1] != '\\' || raw[i+2] != 'u' {
				return fmt.Errorf("lone high surrogate \\u%04x: %w", r, ErrInvalidUnicode)
			}
			lo, ok := hex4(raw[i+3:])
			if !ok || lo < 0xDC00 || lo > 0xDFFF {
				return fmt.Errorf("lone high surrogate \\u%04x: %w", r, ErrInvalidUnicode)
			}
			i += 6
		}
	}
	return nil
}

func hex4(b []byte) (rune, bool) {
	if len(b) < 4 {
		return 0, false
	}
	n, err := strconv.ParseUint(string(b[:4]), 16, 16)
	if err != nil {
		return 0, false
	}
	return rune(n), true
}

// appendString writes s as RFC 8785 section 3.2.2.2 asks: only the quote,
// the backslash and control characters are escaped, with the short forms
// where JSON has them and \u00xx in lowercase hex otherwise.
func appendString(dst []byte, s string) []byte {
	const hexdigits = "0123456789abcdef"
	dst = append(dst, '"')
	for i := 0; i < len(s); i++ {
		c := s[i]
		switch c {
		case '"':
			dst = append(dst, '\\', '"')
		case '\\':
			dst = append(dst, '\\', '\\')
		case '\b':
			dst = append(dst, '\\', 'b')
		case '\f':
			dst = append(dst, '\\', 'f')
		case '\n':
			dst = append(dst, '\\', 'n')
		case '\r':
			dst = append(dst, '\\', 'r')
		case '\t':
			dst = append(dst, '\\', 't')
		default:
			if c < 0x20 {
				dst = append(dst, '\\', 'u', '0', '0', hexdigits[c>>4], hexdigits[c&0xF])
			} else {
				dst = append(dst, c)
			}
		}
	}
	return append(dst, '"')
}

// appendNumber parses a JSON number literal as an IEEE-754 double and
// writes it in canonical form.
func appendNumber(dst []byte, lit string) ([]byte, error) {
	f, err := strconv.ParseFloat(lit, 64)
	if err != nil {
		if ne, ok := errors.AsType[*strconv.NumError](err); ok {
			err = ne.Err // the literal is named below, shortened
		}
		if len(lit) > 32 {
			lit = lit[:32] + "..."
		}
		return nil, fmt.Errorf("canon: number %s: %w: %w", lit, ErrNumber, err)
	}
	s, err := formatNumber(f)
	if err != nil {
		return nil, err
	}
	return append(dst, s...), nil
}

// formatNumber writes f as ECMAScript's Number.prototype.toString does
// (ECMA-262 Number::toString, RFC 8785 section 3.2.2.3).
func formatNumber(f float64) (string, error) {
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return "", fmt.Errorf("canon: %v: %w", f, ErrNumber)
	}
	if f == 0 {
		return "0", nil // also for -0
	}
	// Shortest digits that read back as f: "-d.dddde±xx".
	s := strconv.FormatFloat(f, 'e', -1, 64)
	var b strings.Builder
	if s[0] == '-' {
		b.WriteByte('-')
		s = s[1:]
	}
	mant, exp, _ := strings.Cut(s, "e")
	e, err := strconv.Atoi(exp)
	if err != nil {
		return "", fmt.Errorf("canon: formatting %v: %w", f, err)
	}
	digits := strings.Replace(mant, ".", "", 1)
	// In ECMA-262's terms the value is 0.digits × 10^n with k digits.
	k, n := len(digits), e+1
	switch {
	case k <= n && n <= 21:
		b.WriteString(digits)
		b.WriteString(strings.Repeat("0", n-k))
	case 0 < n && n <= 21:
		b.WriteString(digits[:n])
		b.WriteByte('.')
		b.WriteString(digits[n:])
	case -6 < n && n <= 0:
		b.WriteString("0.")
		b.WriteString(strings.Repeat("0", -n))
		b.WriteString(digits)
	default:
		b.WriteByte(digits[0])
		if k > 1 {
			b.WriteByte('.')
			b.WriteString(digits[1:])
		}
		b.WriteByte('e')
		if n-1 >= 0 {
			b.WriteByte('+')
		}
		b.WriteString(strconv.Itoa(n - 1))
	}
	return b.String(), nil
}
