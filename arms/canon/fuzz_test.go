package canon

import (
	"bytes"
	"encoding/json"
	"os"
	"path/filepath"
	"testing"
	"unicode/utf8"
)

// FuzzTransform checks the properties RFC 8785 gives the canonical form:
// it is valid JSON (section 3.2) in UTF-8 (section 3.2.4), and
// canonicalizing it again changes nothing, since sorting, escaping and
// number serialization are each idempotent (sections 3.2.2 and 3.2.3).
func FuzzTransform(f *testing.F) {
	paths, _ := filepath.Glob(filepath.Join(jcsDir, "input", "*.json"))
	for _, p := range paths {
		if b, err := os.ReadFile(p); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, doc []byte) {
		once, err := Transform(doc)
		if err != nil {
			return
		}
		if !json.Valid(once) {
			t.Fatalf("Transform(%q) = %q, not valid JSON", doc, once)
		}
		if !utf8.Valid(once) {
			t.Fatalf("Transform(%q) = %q, not UTF-8", doc, once)
		}
		twice, err := Transform(once)
		if err != nil {
			t.Fatalf("Transform(%q) = %q, which Transform rejects: %v", doc, once, err)
		}
		if !bytes.Equal(once, twice) {
			t.Fatalf("not a fixed point:\n once %q\ntwice %q", once, twice)
		}
	})
}
