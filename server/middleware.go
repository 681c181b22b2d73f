package server

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"net/http"
	"time"

	"github.com/go-chi/chi/v5"
	"github.com/go-chi/chi/v5/middleware"

	"trialogue/store"
)

// securityHeaders sets what every answer carries. Entry links hold
// respondent ids, so no referrer ever leaves; scripts come only from this
// server. Pages that may be framed set their own frame-ancestors.
func securityHeaders(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		h := w.Header()
		h.Set("X-Content-Type-Options", "nosniff")
		h.Set("Referrer-Policy", "no-referrer")
		h.Set("Content-Security-Policy", csp("'none'"))
		next.ServeHTTP(w, r)
	})
}

func csp(frameAncestors string) string {
	return "default-src 'self'; script-src 'self'; style-src 'self'; img-src 'self' data:; connect-src 'self'; " +
		"base-uri 'none'; form-action 'self'; frame-ancestors " + frameAncestors
}

// logRequests logs each request by its route pattern, so tokens and
// respondent ids in the address never reach the log.
func (s *Server) logRequests(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		ww := middleware.NewWrapResponseWriter(w, r.ProtoMajor)
		next.ServeHTTP(ww, r)
		s.log.Info("request", slog.String("method", r.Method), slog.String("route", routeOf(r)),
			slog.Int("status", ww.Status()), slog.Duration("took", time.Since(start)))
	})
}

func routeOf(r *http.Request) string {
	if rc := chi.RouteContext(r.Context()); rc != nil && rc.RoutePattern() != "" {
		return rc.RoutePattern()
	}
	return "unmatched"
}

func (s *Server) recoverer(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		defer func() {
			if v := recover(); v != nil {
				if v == http.ErrAbortHandler {
					panic(v)
				}
				s.fail(w, r, fmt.Errorf("panic: %v", v))
			}
		}()
		next.ServeHTTP(w, r)
	})
}

type ctxKey int

const sessionKey ctxKey = 0

// withSession resolves the token in the address to its session.
func (s *Server) withSession(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		token := chi.URLParam(r, "token")
		if len(token) < 16 || len(token) > 64 {
			s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "unknown link"})
			return
		}
		sess, err := s.store.SessionByToken(r.Context(), token)
		if errors.Is(err, store.ErrNotFound) {
			s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "unknown link"})
			return
		}
		if err != nil {
			s.fail(w, r, err)
			return
		}
		st, err := s.studyOf(r.Context(), sess)
		if errors.Is(err, store.ErrNotFound) {
			s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "this study is not being served", Err: err})
			return
		}
		if err != nil {
			s.fail(w, r, err)
			return
		}
		w.Header().Set("Content-Security-Policy", csp(frameAncestors(st.Def)))
		ctx := context.WithValue(r.Context(), sessionKey, &request{sess: sess, study: st, start: start})
		next.ServeHTTP(w, r.WithContext(ctx))
	})
}

// request is the session a respondent request is about.
type request struct {
	sess  store.Session
	study *Study
	start time.Time // when the request reached the session: the server's own clock for overhead
}

func fromContext(ctx context.Context) *request {
	return ctx.Value(sessionKey).(*request)
}
