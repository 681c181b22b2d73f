package server_test

import (
	"compress/gzip"
	"context"
	"errors"
	"io"
	"net/http"
	"regexp"
	"strings"
	"testing"

	"trialogue/store"
)

// rawClient keeps answers as sent: no transparent decompression, no redirects.
var rawClient = &http.Client{
	Transport:     &http.Transport{DisableCompression: true},
	CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse },
}

// get fetches path with the given Accept-Encoding and returns the answer
// and its body, decompressed if it came gzipped.
func get(t *testing.T, url, encoding string) (*http.Response, string) {
	t.Helper()
	req, err := http.NewRequest("GET", url, nil)
	if err != nil {
		t.Fatal(err)
	}
	if encoding != "" {
		req.Header.Set("Accept-Encoding", encoding)
	}
	res, err := rawClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	var r io.Reader = res.Body
	if res.Header.Get("Content-Encoding") == "gzip" {
		gz, err := gzip.NewReader(res.Body)
		if err != nil {
			t.Fatalf("gzip: %v", err)
		}
		r = gz
	}
	b, err := io.ReadAll(r)
	if err != nil {
		t.Fatal(err)
	}
	return res, string(b)
}

var htmlTag = regexp.MustCompile(`<html lang="([^"]*)" dir="([^"]*)">`)

// TestPageLanguage: the entry link's lang= picks the page's language among
// the study's, the session keeps it across reloads and later entries, and
// a language the study does not offer is refused by name, creating nothing.
func TestPageLanguage(t *testing.T) {
	yaml := studyYAML("harrow-lang", scriptedEndpoint, chatArm) + "languages: [ar, es]\ntranslations:\n  es: {send: Mandar}\n"
	f := newFixture(t, yaml, nil)
	enter := func(t *testing.T, query string) *http.Response {
		t.Helper()
		res, _ := get(t, f.http.URL+"/s/harrow-lang?"+query, "")
		return res
	}
	page := func(t *testing.T, loc string) (lang, dir, body string) {
		t.Helper()
		res, body := get(t, f.http.URL+loc, "")
		if res.StatusCode != http.StatusOK {
			t.Fatalf("page: got status %d, want 200", res.StatusCode)
		}
		m := htmlTag.FindStringSubmatch(body)
		if m == nil {
			t.Fatalf("page has no <html lang dir>: %.200s", body)
		}
		return m[1], m[2], body
	}
	t.Run("OKArabicRightToLeft", func(t *testing.T) {
		res := enter(t, "rid=L1&lean=left&lang=AR")
		loc := res.Header.Get("Location")
		for i := range 2 { // the first visit and a reload
			lang, dir, body := page(t, loc)
			if lang != "ar" || dir != "rtl" {
				t.Errorf("visit %d: got lang=%q dir=%q, want ar rtl", i+1, lang, dir)
			}
			// the Arabic catalogue's Send (web/messages/ar.json)
			if !strings.Contains(body, `>إرسال</button>`) {
				t.Errorf("visit %d: got no Arabic Send button", i+1)
			}
		}
		// the same respondent entering again with another lang keeps the first
		again := enter(t, "rid=L1&lean=left&lang=es")
		if got := again.Header.Get("Location"); got != loc {
			t.Fatalf("re-entry: got %s, want the same session %s", got, loc)
		}
		if lang, _, _ := page(t, loc); lang != "ar" {
			t.Errorf("after re-entry: got lang %q, want ar", lang)
		}
	})
	t.Run("OKStudyTranslation", func(t *testing.T) {
		_, _, body := page(t, enter(t, "rid=L2&lean=left&lang=es-MX").Header.Get("Location"))
		if !strings.Contains(body, `>Mandar</button>`) {
			t.Error("got no Spanish override of Send, want Mandar from translations.es")
		}
	})
	t.Run("OKDefaultLanguage", func(t *testing.T) {
		lang, dir, _ := page(t, enter(t, "rid=L3&lean=right").Header.Get("Location"))
		if lang != "en" || dir != "ltr" {
			t.Errorf("got lang=%q dir=%q, want en ltr", lang, dir)
		}
	})
	t.Run("ErrLanguageNotOffered", func(t *testing.T) {
		res, body := get(t, f.http.URL+"/s/harrow-lang?rid=L4&lean=left&lang=de", "")
		if res.StatusCode != http.StatusBadRequest || !strings.Contains(body, "lang:") {
			t.Errorf("got %d, want 400 naming lang", res.StatusCode)
		}
		if _, err := f.st.SessionByRID(context.Background(), "harrow-lang", "L4"); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("session of a refused entry: got %v, want ErrNotFound", err)
		}
	})
	t.Run("ErrEntryPageInChosenLanguage", func(t *testing.T) {
		res, body := get(t, f.http.URL+"/s/harrow-lang?rid=L5&lang=ar", "")
		m := htmlTag.FindStringSubmatch(body)
		if res.StatusCode != http.StatusBadRequest || m == nil || m[1] != "ar" || m[2] != "rtl" {
			t.Errorf("missing covariate with lang=ar: got %d %v, want a 400 page in ar, rtl", res.StatusCode, m)
		}
	})
}

// TestCompression: the page, its script and its style travel gzipped to a
// client that accepts gzip (RFC 9110 section 8.4, Content-Encoding), and the
// reply's event stream does not, so each event leaves at once.
func TestCompression(t *testing.T) {
	f := newFixture(t, studyYAML("harrow-gzip", scriptedEndpoint, chatArm), nil)
	loc := "/c/" + f.enter("G1", "left")
	res, body := get(t, f.http.URL+loc, "gzip")
	if got := res.Header.Get("Content-Encoding"); got != "gzip" {
		t.Fatalf("page: got Content-Encoding %q, want gzip", got)
	}
	for _, name := range regexp.MustCompile(`/static/[a-z]+\.[0-9a-f]{10}\.(?:css|js)`).FindAllString(body, -1) {
		res, _ := get(t, f.http.URL+name, "gzip")
		if got := res.Header.Get("Content-Encoding"); got != "gzip" {
			t.Errorf("%s: got Content-Encoding %q, want gzip", name, got)
		}
		if got := res.Header.Get("Cache-Control"); !strings.Contains(got, "immutable") {
			t.Errorf("%s: got Cache-Control %q, want immutable", name, got)
		}
	}
	t.Run("OKIdentityWithoutAcceptEncoding", func(t *testing.T) {
		res, body := get(t, f.http.URL+loc, "")
		if res.Header.Get("Content-Encoding") != "" || !strings.Contains(body, "<html") {
			t.Errorf("got Content-Encoding %q, want none", res.Header.Get("Content-Encoding"))
		}
	})
	t.Run("OKEventStreamNotCompressed", func(t *testing.T) {
		req, _ := http.NewRequest("POST", f.http.URL+loc+"/resume", strings.NewReader("{}"))
		req.Header.Set("Accept", "text/event-stream")
		req.Header.Set("Accept-Encoding", "gzip")
		res, err := rawClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		defer res.Body.Close()
		b, _ := io.ReadAll(res.Body)
		if ce := res.Header.Get("Content-Encoding"); ce != "" || !strings.Contains(string(b), "event: done") {
			t.Errorf("got Content-Encoding %q and body %.80q, want a plain event stream", ce, b)
		}
	})
}
