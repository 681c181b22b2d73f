package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"testing"
)

// TestCheckTranslations: trialogue check refuses a study whose page
// languages (its language and the further ones entry links may choose) lack
// a translation of any page string, naming the keys and where to put them;
// the shipped catalogues, or the study's own texts, make it pass.
func TestCheckTranslations(t *testing.T) {
	src, err := os.ReadFile(demoStudyPath)
	if err != nil {
		t.Fatal(err)
	}
	// every key of the English catalogue, for a study that translates them all
	var en map[string]string
	b, err := os.ReadFile("../../web/messages/en.json")
	if err != nil {
		t.Fatal(err)
	}
	if err := json.Unmarshal(b, &en); err != nil {
		t.Fatal(err)
	}
	keys := make([]string, 0, len(en))
	for k := range en {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	var all strings.Builder
	for _, k := range keys {
		if k == "intro" || k == "disclosure" || k == "closing" {
			continue // the demo study's texts have these
		}
		all.WriteString("  " + k + ": \"tradução de " + k + "\"\n")
	}
	// check runs trialogue check on the demo study with from→to replacements.
	check := func(t *testing.T, fromTo ...string) (int, string, string) {
		t.Helper()
		study := string(src)
		for i := 0; i < len(fromTo); i += 2 {
			if !strings.Contains(study, fromTo[i]) {
				t.Fatalf("the demo study has no %q to replace", fromTo[i])
			}
			study = strings.Replace(study, fromTo[i], fromTo[i+1], 1)
		}
		path := filepath.Join(t.TempDir(), "study.yaml")
		if err := os.WriteFile(path, []byte(study), 0o600); err != nil {
			t.Fatal(err)
		}
		var out, errb bytes.Buffer
		code := run(context.Background(), []string{"check", path}, &out, &errb)
		return code, out.String(), errb.String()
	}
	t.Run("OKShippedCatalogues", func(t *testing.T) {
		if code, _, stderr := check(t, "language: en\n", "language: en\nlanguages: [es, de, fr, ar]\n"); code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, stderr)
		}
	})
	t.Run("ErrStudyLanguageWithoutCatalogue", func(t *testing.T) {
		code, out, stderr := check(t, "language: en\n", "language: pt\n", "\ntexts:\n", "\ntexts:\n  send: Enviar\n")
		if code != exitUsage || out != "" {
			t.Fatalf("got exit %d and output %q, want 2 and none", code, out)
		}
		for _, want := range []string{"language pt: no translation for", "continue", "under texts", "ar, de, en, es, fr"} {
			if !strings.Contains(stderr, want) {
				t.Errorf("stderr lacks %q: %s", want, stderr)
			}
		}
		if strings.Contains(stderr, "send,") || strings.Contains(stderr, ", send") {
			t.Errorf("stderr names send, which texts translates: %s", stderr)
		}
	})
	t.Run("ErrEntryLanguageWithoutCatalogue", func(t *testing.T) {
		code, _, stderr := check(t, "language: en\n", "language: en\nlanguages: [es, it]\n")
		if code != exitUsage || !strings.Contains(stderr, "language it: no translation") || !strings.Contains(stderr, "translations.it") || strings.Contains(stderr, "language es") {
			t.Fatalf("got exit %d, stderr %q; want 2 naming it (not es) and translations.it", code, stderr)
		}
	})
	t.Run("ErrUnknownTranslationKey", func(t *testing.T) {
		code, _, stderr := check(t, "language: en\n", "language: en\nlanguages: [es]\ntranslations:\n  es: {sned: Enviar}\n")
		if code != exitUsage || !strings.Contains(stderr, "translations.es.sned") {
			t.Fatalf("got exit %d, stderr %q; want 2 naming translations.es.sned", code, stderr)
		}
	})
	t.Run("OKStudyTranslatesEverything", func(t *testing.T) {
		if code, _, stderr := check(t, "language: en\n", "language: pt\n", "\ntexts:\n", "\ntexts:\n"+all.String()); code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, stderr)
		}
	})
}
