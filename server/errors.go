package server

import (
	"crypto/rand"
	"encoding/hex"
	"encoding/json"
	"errors"
	"log/slog"
	"net/http"
	"strings"

	"trialogue/arms"
)

// Error is a failure with two audiences: the respondent sees the catalogue
// text named by Key (in their language) and a reference code; the log gets
// the precise cause.
type Error struct {
	Status int
	Key    string // message catalogue key of the respondent-facing text
	Rule   string // for refused replies: which rule (too_short, max_reached, ...)
	Field  string // for bad entry links: which field
	Msg    string // a precise, safe description (shown in JSON answers and error pages)
	Err    error  // the internal cause, logged, never shown
}

func (e *Error) Error() string {
	if e.Err != nil {
		return e.Msg + ": " + e.Err.Error()
	}
	return e.Msg
}

func (e *Error) Unwrap() error { return e.Err }

// errorPage is the data of the error page.
type errorPage struct {
	pageBase
	Message   string
	Field     string
	Reference string
}

// pageBase is what every page's layout needs.
type pageBase struct {
	Lang, Dir string
	PageTitle string
	T         map[string]string
}

// wantsJSON reports whether an error should be answered as JSON: the
// respondent page's API calls, or a client that asks for it.
func wantsJSON(r *http.Request) bool {
	if strings.Contains(r.Header.Get("Accept"), "application/json") || strings.Contains(r.Header.Get("Accept"), "text/event-stream") {
		return true
	}
	return r.Method != http.MethodGet || strings.HasSuffix(r.URL.Path, "/state")
}

// fail is the one error path: it logs internal errors with a reference
// code and answers with a safe message as HTML or JSON.
func (s *Server) fail(w http.ResponseWriter, r *http.Request, err error) {
	var e *Error
	if !errors.As(err, &e) {
		var re *arms.RuleError
		if errors.As(err, &re) {
			e = &Error{Status: re.Status, Key: re.Rule, Rule: re.Rule, Msg: re.Msg}
		} else {
			e = &Error{Status: http.StatusInternalServerError, Key: "server_error", Msg: "internal error", Err: err}
		}
	}
	ref := reference()
	if e.Status >= 500 {
		s.log.Error("request failed", slog.String("ref", ref), slog.String("route", routeOf(r)), slog.Any("err", e))
	}
	lang, texts := s.respondentTexts(r)
	msg := texts[e.Key]
	if msg == "" {
		msg = e.Msg
	}
	if wantsJSON(r) {
		writeJSON(w, e.Status, map[string]string{"error": e.Msg, "rule": e.Rule, "field": e.Field, "reference": ref})
		return
	}
	page := errorPage{pageBase: pageBase{Lang: lang, Dir: direction(lang), PageTitle: texts["error_title"], T: texts},
		Message: msg, Reference: ref}
	if e.Field != "" {
		page.Field = e.Field + ": " + e.Msg
	}
	var b strings.Builder
	if rerr := s.assets.Render(&b, "error", page); rerr != nil {
		s.log.Error("render error page", slog.Any("err", rerr))
		http.Error(w, http.StatusText(e.Status)+" ("+ref+")", e.Status)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.WriteHeader(e.Status)
	w.Write([]byte(b.String()))
}

// reference returns a short code that ties what a respondent reports to a log line.
func reference() string {
	var b [4]byte
	rand.Read(b[:])
	return strings.ToUpper(hex.EncodeToString(b[:]))
}

func writeJSON(w http.ResponseWriter, status int, v any) {
	b, err := json.Marshal(v)
	if err != nil {
		http.Error(w, `{"error":"internal error"}`, http.StatusInternalServerError)
		return
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("Cache-Control", "no-store")
	w.WriteHeader(status)
	w.Write(b)
	w.Write([]byte("\n"))
}
