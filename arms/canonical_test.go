package arms

import (
	"encoding/hex"
	"encoding/json"
	"path/filepath"
	"testing"
)

// mustHash returns the version hash of a study that must parse.
func mustHash(tb testing.TB, name, src string) string {
	tb.Helper()
	s, err := Parse(name, []byte(src))
	if err != nil {
		tb.Fatalf("Parse(%s): %v", name, err)
	}
	h, err := s.Hash()
	if err != nil {
		tb.Fatalf("Hash(%s): %v", name, err)
	}
	return h
}

// TestCanonical checks the canonical form behind version hashes. The scheme
// is RFC 8785, the JSON Canonicalization Scheme (JCS): members sorted by
// name (section 3.2.3), no insignificant whitespace (section 3.2.1), and
// numbers and strings in one spelling each (section 3.2.2), so only the
// study's meaning reaches the hash, never how its YAML is laid out.
func TestCanonical(t *testing.T) {
	base := string(mustRead(t, filepath.Join(studiesDir, "minimal.yaml")))
	baseHash := mustHash(t, "minimal.yaml", base)

	t.Run("OKIsJCS", func(t *testing.T) {
		s, err := Parse("minimal.yaml", []byte(base))
		if err != nil {
			t.Fatal(err)
		}
		c, err := s.Canonical()
		if err != nil {
			t.Fatal(err)
		}
		if !json.Valid(c) {
			t.Fatalf("got %q, want valid JSON", c)
		}
		// RFC 8785 section 3.2.3: members sorted, so "allocation" leads,
		// and section 3.2.1: no whitespace between tokens.
		const prefix = `{"allocation":{"arms":{"notice":1,"talk":1},"blocks":[2,4]},"ar`
		if len(c) < len(prefix) || string(c[:len(prefix)]) != prefix {
			t.Errorf("got %.100q..., want it to start %q", c, prefix)
		}
		if b, err := hex.DecodeString(baseHash); err != nil || len(b) != 32 {
			t.Errorf("Hash: got %q, want 64 lowercase hex digits of SHA-256", baseHash)
		}
	})

	t.Run("OKSameMeaningSameHash", func(t *testing.T) {
		variants := map[string]string{
			"restyled fixture": string(mustRead(t, filepath.Join(studiesDir, "minimal-restyled.yaml"))),
			"comments added": edit(t, base,
				"strata: [stance]", "strata: [stance]   # one sequence per stance",
				"arms:\n", "# the two conditions\narms:\n"),
			"flow to block": edit(t, base, "replies: {min: 1, max: 3}", "replies:\n      min: 1\n      max: 3"),
			"quoting": edit(t, base,
				"id: fernbrook-footbridge", `id: "fernbrook-footbridge"`,
				"kind: chat", "kind: 'chat'"),
			"escapes": edit(t, base, "title: Fernbrook footbridge", `title: "Fern\x62rook\u0020footbridge"`),
			"defaults written out": edit(t, base,
				"title: Fernbrook footbridge", "title: Fernbrook footbridge\nlanguage: en",
				"{min: 1, max: 3}", "{min: 1, max: 3, max_chars: 1500}",
				"{kind: scripted}", "{kind: scripted, timeout: 60s, attempts: 4, model: scripted}",
				"    kind: fixed\n", "    kind: fixed\n    code: A1\n"),
			"timeout spelled differently": edit(t, base, "{kind: scripted}", "{kind: scripted, timeout: 1m0s}"),
		}
		for name, src := range variants {
			if got := mustHash(t, name, src); got != baseHash {
				t.Errorf("%s: got hash %s, want %s", name, got, baseHash)
			}
		}
	})

	t.Run("OKChangedMeaningNewHash", func(t *testing.T) {
		variants := map[string]string{
			"one word of a prompt":  edit(t, base, "about the footbridge.", "about the bridge."),
			"a ratio":               edit(t, base, "{notice: 1, talk: 1}", "{notice: 2, talk: 1}", "[2, 4]", "[3, 6]"),
			"a temperature":         edit(t, base, "{kind: scripted}", "{kind: scripted, temperature: 0.7}"),
			"another temperature":   edit(t, base, "{kind: scripted}", "{kind: scripted, temperature: 0.8}"),
			"a block size":          edit(t, base, "[2, 4]", "[2, 6]"),
			"arm order (codes)":     edit(t, base, "  notice:\n    kind: fixed\n    text: Fernbrook plans a footbridge over the Lowmere stream.\n", "", "return:", "  notice:\n    kind: fixed\n    text: Fernbrook plans a footbridge over the Lowmere stream.\nreturn:"),
			"a seed":                edit(t, base, "{kind: scripted}", "{kind: scripted, seed: 9007199254740991}"),
			"a nearby seed":         edit(t, base, "{kind: scripted}", "{kind: scripted, seed: 9007199254740990}"),
			"a covariate bound":     edit(t, base, "max: 99", "max: 98"),
			"a required covariate":  edit(t, base, "max: 99, required: true", "max: 99"),
			"a return address":      edit(t, base, "/back?", "/resume?"),
			"the replies maximum":   edit(t, base, "max: 3}", "max: 4}"),
			"a trailing line break": edit(t, base, "    text: Fernbrook plans a footbridge over the Lowmere stream.", "    text: |\n      Fernbrook plans a footbridge over the Lowmere stream."),
		}
		seen := map[string]string{baseHash: "base"}
		for name, src := range variants {
			got := mustHash(t, name, src)
			if other, dup := seen[got]; dup {
				t.Errorf("%s: got hash %s, the same as %s, want a new hash", name, got, other)
			}
			seen[got] = name
		}
	})
}
