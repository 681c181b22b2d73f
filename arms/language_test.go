package arms_test

import (
	"errors"
	"net/url"
	"os"
	"strings"
	"testing"

	"trialogue/arms"
)

// multilingual is the minimal study offering its page in English (the
// study's language), Spanish and Arabic.
func multilingual(t *testing.T, extra string) (*arms.Study, error) {
	t.Helper()
	b, err := os.ReadFile("../testdata/studies/minimal.yaml")
	if err != nil {
		t.Fatal(err)
	}
	return arms.Parse("multilingual.yaml", []byte(string(b)+"language: en\nlanguages: [es, ar]\n"+extra))
}

// TestEntryLanguage: the lang parameter of an entry link picks one of the
// study's page languages; survey platforms' spellings (upper case, a region,
// an underscore) resolve to it, and anything else is refused by name.
func TestEntryLanguage(t *testing.T) {
	s, err := multilingual(t, "")
	if err != nil {
		t.Fatal(err)
	}
	const base = "rid=R1&age=30&stance=favour"
	tests := []struct {
		name, lang string
		want       string // "" for the study's language
		err        bool
	}{
		{"OKAbsent", "", "", false},
		{"OKStudyLanguage", "en", "en", false},
		{"OKOffered", "ar", "ar", false},
		{"OKUpperCase", "ES", "es", false},
		{"OKRegionFallsBack", "es-MX", "es", false},
		{"OKUnderscoreRegion", "ar_EG", "ar", false},
		{"ErrNotOffered", "de", "", true},
		{"ErrGarbage", "<script>", "", true},
		{"ErrTooLong", strings.Repeat("x", 40), "", true},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			q := base
			if tc.lang != "" {
				q += "&lang=" + url.QueryEscape(tc.lang)
			}
			v, _ := url.ParseQuery(q)
			r, err := s.ParseEntry(v)
			var fe *arms.FieldError
			if tc.err {
				if !errors.As(err, &fe) || fe.Field != "lang" {
					t.Fatalf("got %v, want a FieldError on lang", err)
				}
				return
			}
			if err != nil {
				t.Fatalf("got %v, want no error", err)
			}
			if r.Language != tc.want {
				t.Errorf("got language %q, want %q", r.Language, tc.want)
			}
		})
	}
	t.Run("ErrRepeated", func(t *testing.T) {
		v, _ := url.ParseQuery(base + "&lang=es&lang=ar")
		var fe *arms.FieldError
		if _, err := s.ParseEntry(v); !errors.As(err, &fe) || fe.Field != "lang" {
			t.Fatalf("got %v, want a FieldError on lang", err)
		}
	})
}

// TestLanguagesValidation: further languages and translations are checked
// with the study file's line and column.
func TestLanguagesValidation(t *testing.T) {
	t.Run("OKTranslations", func(t *testing.T) {
		s, err := multilingual(t, "texts: {intro: Welcome.}\ntranslations:\n  es: {intro: Bienvenida.}\n  en: {send: Post}\n")
		if err != nil {
			t.Fatal(err)
		}
		if got := s.TextOverrides(""); got["intro"] != "Welcome." || got["send"] != "Post" {
			t.Errorf("overrides for the study's language: got %v, want intro from texts and send from translations.en", got)
		}
		if got := s.TextOverrides("es"); got["intro"] != "Bienvenida." || got["send"] != "" {
			t.Errorf("overrides for es: got %v, want only translations.es", got)
		}
		if got := s.TextOverrides("ar"); len(got) != 0 {
			t.Errorf("overrides for ar: got %v, want none", got)
		}
		if got := strings.Join(s.PageLanguages(), ","); got != "en,es,ar" {
			t.Errorf("page languages: got %s, want en,es,ar", got)
		}
	})
	t.Run("ErrTranslationOfOtherLanguage", func(t *testing.T) {
		_, err := multilingual(t, "translations:\n  de: {send: Senden}\n")
		// line 26 of the file is "  de: ..." (minimal.yaml has 22 lines, then 4 added)
		if want := `multilingual.yaml:26:`; err == nil || !strings.Contains(err.Error(), want) || !strings.Contains(err.Error(), `translations for "de"`) {
			t.Fatalf("got %v, want an error at %s naming de", err, want)
		}
	})
	t.Run("ErrBadCode", func(t *testing.T) {
		b, _ := os.ReadFile("../testdata/studies/minimal.yaml")
		_, err := arms.Parse("bad.yaml", []byte(string(b)+"languages: [es, Arabic, es]\n"))
		if err == nil || !strings.Contains(err.Error(), `got "Arabic"`) || !strings.Contains(err.Error(), `"es" is listed twice`) {
			t.Fatalf("got %v, want errors for Arabic and the repeated es", err)
		}
	})
}
