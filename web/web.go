// Package web holds what Trialogue shows in a browser: templates, the
// respondent page's script and style, and the message catalogues, embedded
// in the binary. Static files are served at content-hashed addresses so
// they can be cached for a year.
package web

import (
	"bytes"
	"compress/gzip"
	"crypto/sha256"
	"embed"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"html/template"
	"io"
	"io/fs"
	"mime"
	"net/http"
	"path"
	"sort"
	"strconv"
	"strings"
)

//go:embed templates/*.html static messages/*.json
var files embed.FS

// Assets are the parsed templates and the hashed static files.
type Assets struct {
	pages  map[string]*template.Template
	static map[string]asset // by hashed name
	urls   map[string]string
	texts  map[string]map[string]string
}

type asset struct {
	body  []byte
	gz    []byte // the body gzipped once at start
	ctype string
}

// Load parses every template and catalogue, so that a broken one fails at
// start rather than on a request.
func Load() (*Assets, error) {
	a := &Assets{pages: map[string]*template.Template{}, static: map[string]asset{}, urls: map[string]string{}, texts: map[string]map[string]string{}}
	err := fs.WalkDir(files, "static", func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		b, err := files.ReadFile(p)
		if err != nil {
			return err
		}
		sum := sha256.Sum256(b)
		name := path.Base(p)
		ext := path.Ext(name)
		hashed := strings.TrimSuffix(name, ext) + "." + hex.EncodeToString(sum[:5]) + ext
		var gz bytes.Buffer
		zw, err := gzip.NewWriterLevel(&gz, gzip.BestCompression)
		if err != nil {
			return err
		}
		if _, err := zw.Write(b); err != nil {
			return err
		}
		if err := zw.Close(); err != nil {
			return err
		}
		a.static[hashed] = asset{body: b, gz: gz.Bytes(), ctype: mime.TypeByExtension(ext)}
		a.urls[name] = "/static/" + hashed
		return nil
	})
	if err != nil {
		return nil, fmt.Errorf("load static files: %w", err)
	}
	cats, err := fs.Glob(files, "messages/*.json")
	if err != nil {
		return nil, fmt.Errorf("load messages: %w", err)
	}
	for _, c := range cats {
		b, err := files.ReadFile(c)
		if err != nil {
			return nil, fmt.Errorf("load messages: %w", err)
		}
		m := map[string]string{}
		if err := json.Unmarshal(b, &m); err != nil {
			return nil, fmt.Errorf("load messages %s: %w", c, err)
		}
		a.texts[strings.TrimSuffix(path.Base(c), ".json")] = m
	}
	if _, ok := a.texts["en"]; !ok {
		return nil, fmt.Errorf("load messages: the English catalogue is missing")
	}
	funcs := template.FuncMap{"static": a.StaticURL}
	pages, err := fs.Glob(files, "templates/*.html")
	if err != nil {
		return nil, fmt.Errorf("load templates: %w", err)
	}
	for _, p := range pages {
		name := strings.TrimSuffix(path.Base(p), ".html")
		if name == "layout" || name == "console_layout" {
			continue
		}
		// The researcher console's pages have a layout of their own.
		layout := "layout.html"
		if strings.HasPrefix(name, "console") {
			layout = "console_layout.html"
		}
		t, err := template.New(layout).Funcs(funcs).ParseFS(files, "templates/"+layout, p)
		if err != nil {
			return nil, fmt.Errorf("load template %s: %w", name, err)
		}
		a.pages[name] = t
	}
	return a, nil
}

// StaticURL returns the hashed address of a static file, by its plain name.
func (a *Assets) StaticURL(name string) string {
	if u, ok := a.urls[name]; ok {
		return u
	}
	return "/static/missing/" + name
}

// Render renders a page into w in one write, so that a template error
// never leaves half a page behind.
func (a *Assets) Render(w io.Writer, page string, data any) error {
	t, ok := a.pages[page]
	if !ok {
		return fmt.Errorf("render: no page %q", page)
	}
	var buf bytes.Buffer
	if err := t.Execute(&buf, data); err != nil {
		return fmt.Errorf("render %s: %w", page, err)
	}
	_, err := w.Write(buf.Bytes())
	return err
}

// Texts returns the catalogue of a language, English strings filling any
// gaps, with the study's overrides applied on top.
func (a *Assets) Texts(lang string, overrides map[string]string) map[string]string {
	out := make(map[string]string, len(a.texts["en"]))
	for k, v := range a.texts["en"] {
		out[k] = v
	}
	base, _, _ := strings.Cut(lang, "-")
	for k, v := range a.texts[base] {
		out[k] = v
	}
	for k, v := range a.texts[lang] {
		out[k] = v
	}
	for k, v := range overrides {
		out[k] = v
	}
	return out
}

// Languages lists the languages that have a catalogue, sorted.
func (a *Assets) Languages() []string {
	out := make([]string, 0, len(a.texts))
	for l := range a.texts {
		out = append(out, l)
	}
	sort.Strings(out)
	return out
}

// Missing lists, sorted, the keys of the English catalogue that neither the
// catalogue of lang (or of its base language, for a code with a region) nor
// the study's overrides translate: the strings a respondent would see in
// English on a page in lang. English itself misses nothing.
func (a *Assets) Missing(lang string, overrides map[string]string) []string {
	base, _, _ := strings.Cut(lang, "-")
	if base == "en" {
		return nil
	}
	var out []string
	for k := range a.texts["en"] {
		if _, ok := overrides[k]; ok {
			continue
		}
		if _, ok := a.texts[lang][k]; ok {
			continue
		}
		if _, ok := a.texts[base][k]; ok {
			continue
		}
		out = append(out, k)
	}
	sort.Strings(out)
	return out
}

// TextKeys lists the keys of the English catalogue: what a study may override.
func (a *Assets) TextKeys() map[string]bool {
	out := map[string]bool{}
	for k := range a.texts["en"] {
		out[k] = true
	}
	return out
}

// ServeStatic serves a hashed static file with a one-year cache lifetime.
func (a *Assets) ServeStatic(w http.ResponseWriter, r *http.Request, name string) {
	f, ok := a.static[name]
	if !ok {
		http.NotFound(w, r)
		return
	}
	h := w.Header()
	h.Set("Content-Type", f.ctype)
	h.Set("Cache-Control", "public, max-age=31536000, immutable")
	h.Add("Vary", "Accept-Encoding")
	body := f.body
	if strings.Contains(r.Header.Get("Accept-Encoding"), "gzip") && len(f.gz) < len(f.body) {
		h.Set("Content-Encoding", "gzip")
		body = f.gz
	}
	h.Set("Content-Length", strconv.Itoa(len(body)))
	w.Write(body)
}
