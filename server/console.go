package server

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"strings"
	"time"

	"github.com/go-chi/chi/v5"

	"trialogue/arms"
	"trialogue/store"
)

// Console defaults.
const (
	// DefaultConsoleIdle is how long a console session may sit unused:
	// 30 minutes, within the range OWASP's Session Management Cheat Sheet
	// gives for applications handling sensitive data (from memory).
	DefaultConsoleIdle = 30 * time.Minute
	// consoleMaxAge ends a console session, however busy, after a working day.
	consoleMaxAge = 12 * time.Hour
	// DefaultConsoleRefresh is how often the live monitor asks for new counts.
	DefaultConsoleRefresh = 5 * time.Second
	// consoleMaxForm bounds a console form, in bytes.
	consoleMaxForm = 32 << 10
)

// consoleCautions are shown beside every study in the console: the
// console is where a study starts taking real people.
var consoleCautions = []string{
	"Field a study only with the approval of your ethics board (IRB), under the protocol it approved, and with the informed consent of every participant.",
	"Tell participants honestly that an AI model writes the replies, and debrief them afterwards as the protocol says.",
	"Transcripts are free text and can hold personal details: keep them, share them and delete them as your data-protection rules require.",
	"Use Trialogue only for an approved study: never to target real voters, patients or customers outside one.",
	"Local law and your board's judgement come first: Trialogue records what happened, it does not decide what is allowed.",
}

// consoleRoutes mounts the researcher console under /console. Every
// state-changing request must come from the console's own pages
// (net/http.CrossOriginProtection); pages are never framed and never cached.
func (s *Server) consoleRoutes(r chi.Router) {
	cop := http.NewCrossOriginProtection()
	cop.SetDenyHandler(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		s.consoleFail(w, r, &Error{Status: http.StatusForbidden,
			Msg: "This request came from another site, so it was refused: the console accepts changes only from its own pages."})
	}))
	r.Use(consoleHeaders, cop.Handler)
	r.NotFound(func(w http.ResponseWriter, r *http.Request) {
		s.consoleFail(w, r, &Error{Status: http.StatusNotFound, Msg: "There is no such console page."})
	})
	r.MethodNotAllowed(func(w http.ResponseWriter, r *http.Request) {
		s.consoleFail(w, r, &Error{Status: http.StatusMethodNotAllowed, Msg: "This console address does not take that method."})
	})
	ca := newConsoleAnalysis(s)
	r.Get("/login", s.handleLoginPage)
	r.Post("/login", s.handleLogin)
	r.Group(func(r chi.Router) {
		r.Use(s.requireUser)
		r.Get("/", func(w http.ResponseWriter, r *http.Request) {
			http.Redirect(w, r, "/console/studies", http.StatusSeeOther)
		})
		r.Post("/logout", s.handleLogout)
		r.Get("/account", s.handleAccountPage)
		r.Post("/account", s.handleAccount)
		r.Get("/studies", s.handleStudies)
		r.Route("/studies/{study}", func(r chi.Router) {
			r.Use(s.withConsoleStudy)
			r.Get("/", s.handleStudy)
			r.Get("/monitor", s.handleMonitor)
			r.Get("/monitor.json", s.handleMonitorJSON)
			r.Get("/entries.svg", s.handleEntriesSVG)
			r.Get("/sessions", s.handleTranscripts)
			r.Get("/sessions/{session}", s.handleTranscript)
			r.Get("/export.zip", s.handleExport)
			// Analyses read only: viewers run them too.
			r.Get("/analysis", ca.handleAnalysisForm)
			r.Post("/analysis", ca.handleAnalysisRun)
			r.Get("/analysis/{result}", ca.handleAnalysisResult)
			r.Get("/analysis/{result}/effects.svg", ca.handleAnalysisSVG)
			r.Get("/analysis/{result}/effects.zip", ca.handleAnalysisZip)
			r.Get("/arms-map", ca.handleArmsMap)
			r.Get("/arms-map.svg", ca.handleArmsMapSVG)
			r.Group(func(r chi.Router) {
				r.Use(s.requireOwner)
				r.Post("/phase", s.handlePhase)
				r.Post("/ethics", s.handleEthics)
				r.Post("/sessions/{session}/review", s.handleReview)
			})
		})
	})
}

// consoleHeaders: console pages hold transcripts; they are never framed
// (CSP frame-ancestors 'none', and X-Frame-Options for older browsers,
// RFC 7034) and never stored by a cache (RFC 9111 section 5.2.2.5).
func consoleHeaders(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		h := w.Header()
		h.Set("Content-Security-Policy", csp("'none'"))
		h.Set("X-Frame-Options", "DENY")
		h.Set("Cache-Control", "no-store")
		next.ServeHTTP(w, r)
	})
}

// consolePage is what every console page's layout needs.
type consolePage struct {
	Lang, Dir, PageTitle string
	User                 *store.User  // nil on the sign-in page
	Study                *studyHeader // the study the page is about, if any
	Section              string       // overview, monitor, sessions, analysis or arms-map
	Notice               string       // the outcome of the last action
}

// studyHeader names a study wherever the console shows one: with its phase.
type studyHeader struct {
	ID, Title, Phase string
	Version          int
}

// consoleStudy is the study a console request is about.
type consoleStudy struct {
	Def     *arms.Study
	Version store.StudyVersion // the newest version, or the one served
	State   store.StudyState
	Served  bool
}

func (cs *consoleStudy) header() *studyHeader {
	return &studyHeader{ID: cs.Def.ID, Title: cs.Def.Title, Phase: cs.State.Phase, Version: cs.Version.Version}
}

type consoleKey int

const (
	userKey consoleKey = iota
	studyKey
)

func consoleUser(ctx context.Context) *store.User {
	u, _ := ctx.Value(userKey).(*store.User)
	return u
}

func consoleStudyOf(ctx context.Context) *consoleStudy {
	cs, _ := ctx.Value(studyKey).(*consoleStudy)
	return cs
}

// page fills the layout's data for a request.
func (s *Server) page(r *http.Request, title, section string) consolePage {
	p := consolePage{Lang: "en", Dir: "ltr", PageTitle: title + " · Trialogue console", User: consoleUser(r.Context()), Section: section}
	if cs := consoleStudyOf(r.Context()); cs != nil {
		p.Study = cs.header()
	}
	p.Notice = notices[r.URL.Query().Get("done")]
	return p
}

// notices are the fixed texts shown after an action, named by ?done=, so
// that no text of the address reaches the page.
var notices = map[string]string{
	"phase":    "The phase was changed and the change logged in the study's chain.",
	"ethics":   "The ethics approval reference was saved and logged in the study's chain.",
	"review":   "The review decision was saved and logged in the study's chain.",
	"password": "Your new password is set.",
}

// withConsoleStudy resolves the study in the address: one being served, or
// one the database holds from an earlier run.
func (s *Server) withConsoleStudy(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		cs, err := s.loadConsoleStudy(r.Context(), chi.URLParam(r, "study"))
		if err != nil {
			s.consoleFail(w, r, err)
			return
		}
		next.ServeHTTP(w, r.WithContext(context.WithValue(r.Context(), studyKey, cs)))
	})
}

func (s *Server) loadConsoleStudy(ctx context.Context, id string) (*consoleStudy, error) {
	state, err := s.store.State(ctx, id)
	if errors.Is(err, store.ErrNotFound) {
		return nil, &Error{Status: http.StatusNotFound, Msg: fmt.Sprintf("There is no study %q in this database.", id)}
	}
	if err != nil {
		return nil, err
	}
	cs := &consoleStudy{State: state}
	if st, ok := s.study(id); ok {
		cs.Def, cs.Version, cs.Served = st.Def, st.Version, true
		return cs, nil
	}
	if cs.Version, err = s.store.Study(ctx, id); err != nil {
		return nil, err
	}
	canonical, err := s.store.StudyCanonical(ctx, id, cs.Version.Version)
	if err != nil {
		return nil, err
	}
	if cs.Def, err = arms.FromCanonical(canonical); err != nil {
		return nil, fmt.Errorf("study %s version %d as stored: %w", id, cs.Version.Version, err)
	}
	return cs, nil
}

// consoleFail is the console's one error path, in the style of fail: the
// researcher sees a precise, safe message; internal causes go to the log
// with a reference code. Answers are JSON for the monitor's script and for
// clients that ask for it, a console page otherwise.
func (s *Server) consoleFail(w http.ResponseWriter, r *http.Request, err error) {
	e := consoleError(err)
	ref := reference()
	if e.Status >= 500 {
		s.log.Error("console request failed", slog.String("ref", ref), slog.String("route", routeOf(r)), slog.Any("err", e))
	}
	if consoleWantsJSON(r) {
		writeJSON(w, e.Status, map[string]string{"error": e.Msg, "reference": ref})
		return
	}
	page := consoleErrorPage{consolePage: s.page(r, "Error", ""), Status: e.Status, StatusText: http.StatusText(e.Status), Message: e.Msg, Reference: ref}
	if page.User == nil && e.Status == http.StatusForbidden {
		page.SignIn = true
	}
	s.renderConsole(w, r, e.Status, "console_error", page)
}

// consoleErrorPage is the data of the console's error page.
type consoleErrorPage struct {
	consolePage
	Status     int
	StatusText string
	Message    string
	Reference  string
	SignIn     bool // offer the sign-in page
}

// consoleError maps an error to its status and a message fit to show, with
// the statuses of RFC 9110 section 15.
func consoleError(err error) *Error {
	var e *Error
	var inv *store.InvalidError
	var pe *store.PhaseError
	var fe *store.FrozenError
	switch {
	case errors.As(err, &e):
		return e
	case errors.As(err, &inv):
		return &Error{Status: http.StatusUnprocessableEntity, Msg: inv.Msg, Err: err}
	case errors.As(err, &pe):
		return &Error{Status: http.StatusConflict, Msg: pe.Error(), Err: err}
	case errors.As(err, &fe):
		return &Error{Status: http.StatusConflict, Msg: fe.Error(), Err: err}
	case errors.Is(err, store.ErrConflict):
		return &Error{Status: http.StatusConflict, Msg: "Someone changed this study meanwhile: reload the page and try again.", Err: err}
	case errors.Is(err, store.ErrNotFound):
		return &Error{Status: http.StatusNotFound, Msg: "There is no such study or session.", Err: err}
	}
	return &Error{Status: http.StatusInternalServerError, Msg: "Something went wrong in Trialogue; the log has the details under the reference below.", Err: err}
}

// consoleWantsJSON reports whether a console answer should be JSON.
func consoleWantsJSON(r *http.Request) bool {
	return strings.HasSuffix(r.URL.Path, ".json") || strings.Contains(r.Header.Get("Accept"), "application/json")
}

// renderConsole renders a console page into a buffer, then writes it, so a
// template error becomes a clean error page.
func (s *Server) renderConsole(w http.ResponseWriter, r *http.Request, status int, name string, data any) {
	var b strings.Builder
	if err := s.assets.Render(&b, name, data); err != nil {
		if name == "console_error" {
			s.log.Error("render console error page", slog.Any("err", err))
			http.Error(w, http.StatusText(http.StatusInternalServerError), http.StatusInternalServerError)
			return
		}
		s.consoleFail(w, r, err)
		return
	}
	w.Header().Set("Content-Type", "text/html; charset=utf-8")
	w.WriteHeader(status)
	w.Write([]byte(b.String()))
}

// parseConsoleForm reads a bounded form body.
func parseConsoleForm(w http.ResponseWriter, r *http.Request) error {
	r.Body = http.MaxBytesReader(w, r.Body, consoleMaxForm)
	if err := r.ParseForm(); err != nil {
		var mbe *http.MaxBytesError
		if errors.As(err, &mbe) {
			return &Error{Status: http.StatusRequestEntityTooLarge, Msg: fmt.Sprintf("The form is larger than %d bytes.", consoleMaxForm), Err: err}
		}
		return &Error{Status: http.StatusBadRequest, Msg: "The form could not be read.", Err: err}
	}
	return nil
}

// handleStudies lists the studies in the database.
//
// GET /console/studies
func (s *Server) handleStudies(w http.ResponseWriter, r *http.Request) {
	states, err := s.store.States(r.Context())
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	page := studiesPage{consolePage: s.page(r, "Studies", "")}
	for _, st := range states {
		cs, err := s.loadConsoleStudy(r.Context(), st.ID)
		if err != nil {
			s.consoleFail(w, r, err)
			return
		}
		page.Studies = append(page.Studies, studyRow{studyHeader: *cs.header(), Served: cs.Served, Hash: cs.Version.Hash})
	}
	s.renderConsole(w, r, http.StatusOK, "console_studies", page)
}

// studiesPage is the data of the study list.
type studiesPage struct {
	consolePage
	Studies []studyRow
}

type studyRow struct {
	studyHeader
	Served bool
	Hash   string
}

// fmtTime shows a time in the console: UTC, to the second.
func fmtTime(t time.Time) string {
	if t.IsZero() {
		return ""
	}
	return t.UTC().Format("2006-01-02 15:04:05 UTC")
}

// fmtStored shows a stored time string (store.TimeFormat) like fmtTime.
func fmtStored(v string) string {
	t, err := time.Parse(store.TimeFormat, v)
	if err != nil {
		return v
	}
	return fmtTime(t)
}
