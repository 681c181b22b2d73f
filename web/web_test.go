package web_test

import (
	"regexp"
	"slices"
	"sort"
	"strings"
	"testing"

	"trialogue/web"
)

// placeholder matches the {name} slots that chat.js and the server fill in.
var placeholder = regexp.MustCompile(`\{[a-z_]+\}`)

// TestCatalogues: every shipped catalogue translates every key of the
// English one, with the same placeholders, and nothing else (common
// practice for message catalogues: a missing key would show English on a
// translated page, a lost placeholder would drop a number).
func TestCatalogues(t *testing.T) {
	a, err := web.Load()
	if err != nil {
		t.Fatal(err)
	}
	if got, want := a.Languages(), []string{"ar", "de", "en", "es", "fr"}; !slices.Equal(got, want) {
		t.Fatalf("catalogues: got %v, want %v", got, want)
	}
	en := a.Texts("en", nil)
	for _, lang := range a.Languages() {
		t.Run("OK"+strings.ToUpper(lang), func(t *testing.T) {
			if miss := a.Missing(lang, nil); len(miss) > 0 {
				t.Errorf("got missing keys %v, want none", miss)
			}
			texts := a.Texts(lang, nil)
			for k, v := range en {
				got := placeholder.FindAllString(texts[k], -1)
				want := placeholder.FindAllString(v, -1)
				sort.Strings(got)
				sort.Strings(want)
				if !slices.Equal(got, want) {
					t.Errorf("%s: got placeholders %v, want %v", k, got, want)
				}
				if lang != "en" && v != "" && texts[k] == v && k != "conversation" {
					t.Errorf("%s: got the English text %q, want a translation", k, v)
				}
			}
		})
	}
}

// TestTexts: the study's overrides come first, then the catalogue of the
// exact language, then of its base language, then English.
func TestTexts(t *testing.T) {
	a, err := web.Load()
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OKRegionUsesBase", func(t *testing.T) {
		if got, want := a.Texts("es-MX", nil)["send"], a.Texts("es", nil)["send"]; got != want {
			t.Errorf("got %q, want %q", got, want)
		}
	})
	t.Run("OKOverride", func(t *testing.T) {
		if got := a.Texts("de", map[string]string{"send": "Abschicken"})["send"]; got != "Abschicken" {
			t.Errorf("got %q, want Abschicken", got)
		}
	})
	t.Run("OKUnknownLanguageFallsBackToEnglish", func(t *testing.T) {
		if got, want := a.Texts("pt", nil)["send"], "Send"; got != want {
			t.Errorf("got %q, want %q", got, want)
		}
	})
}

// TestMissing: a language without a catalogue misses every key the study
// does not override; overriding them all leaves nothing missing.
func TestMissing(t *testing.T) {
	a, err := web.Load()
	if err != nil {
		t.Fatal(err)
	}
	keys := a.TextKeys()
	t.Run("ErrNoCatalogue", func(t *testing.T) {
		miss := a.Missing("pt-BR", map[string]string{"send": "Enviar"})
		if len(miss) != len(keys)-1 || slices.Contains(miss, "send") {
			t.Errorf("got %d missing keys (%v), want all %d but send", len(miss), miss, len(keys)-1)
		}
	})
	t.Run("OKAllOverridden", func(t *testing.T) {
		all := map[string]string{}
		for k := range keys {
			all[k] = "x"
		}
		if miss := a.Missing("pt", all); len(miss) != 0 {
			t.Errorf("got %v, want none", miss)
		}
	})
	t.Run("OKEnglish", func(t *testing.T) {
		if miss := a.Missing("en-GB", nil); len(miss) != 0 {
			t.Errorf("got %v, want none", miss)
		}
	})
}
