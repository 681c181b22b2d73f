package server

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"math"
	"net/http"
	"net/url"
	"path"
	"strconv"
	"strings"
	"time"

	"trialogue/store"
)

// Console session cookies. Over TLS the cookie carries the __Host- prefix,
// which binds it to this host, path / and Secure (RFC 6265bis section
// 4.1.3.2); over plain HTTP (a demo on loopback) it cannot, and is kept to
// the console's path instead.
const (
	cookieSecure = "__Host-trialogue-console"
	cookiePlain  = "trialogue-console"
)

// Slowing failed sign-ins: failures in the last loginWindow count; past the
// free allowance, each further failure doubles the wait before the next
// attempt, up to loginMaxWait. A client address gets more free failures
// than an account, since several researchers may share one address.
const (
	loginWindow      = time.Hour
	loginFreeAccount = 5
	loginFreeAddress = 20
	loginMaxWait     = 15 * time.Minute
)

// secureRequest reports whether cookies must be Secure: the request came
// over TLS, or the server sits behind a TLS proxy (--secure-cookies).
func (s *Server) secureRequest(r *http.Request) bool {
	return r.TLS != nil || s.cfg.SecureCookies
}

func (s *Server) sessionCookie(r *http.Request, token string, maxAge int) *http.Cookie {
	c := &http.Cookie{Name: cookiePlain, Value: token, Path: "/console", HttpOnly: true, SameSite: http.SameSiteStrictMode, MaxAge: maxAge}
	if s.secureRequest(r) {
		c.Name, c.Path, c.Secure = cookieSecure, "/", true
	}
	return c
}

// consoleToken reads the console session cookie of a request.
func (s *Server) consoleToken(r *http.Request) string {
	name := cookiePlain
	if s.secureRequest(r) {
		name = cookieSecure
	}
	c, err := r.Cookie(name)
	if err != nil {
		return ""
	}
	return c.Value
}

// requireUser lets through requests of a signed-in researcher. Others are
// sent to the sign-in page (pages) or refused with 403 (the monitor's
// script, forms): 401 would need an HTTP authentication scheme in
// WWW-Authenticate (RFC 9110 section 15.5.2), which a cookie sign-in is not.
// An account whose password is a generated one may only replace it.
func (s *Server) requireUser(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		idle := s.cfg.ConsoleIdle
		if idle <= 0 {
			idle = DefaultConsoleIdle
		}
		var u store.User
		err := errors.New("no console session")
		if token := s.consoleToken(r); token != "" {
			u, err = s.store.ConsoleUser(r.Context(), token, idle, consoleMaxAge)
		}
		if err != nil {
			expired := errors.Is(err, store.ErrExpired)
			if !errors.Is(err, store.ErrNotFound) && !expired && s.consoleToken(r) != "" {
				s.consoleFail(w, r, err)
				return
			}
			if r.Method == http.MethodGet && !consoleWantsJSON(r) && !strings.HasSuffix(r.URL.Path, ".svg") {
				q := url.Values{"next": {r.URL.RequestURI()}}
				if expired {
					q.Set("expired", "1")
				}
				http.Redirect(w, r, "/console/login?"+q.Encode(), http.StatusSeeOther)
				return
			}
			msg := "You are not signed in to the console: sign in, then try again."
			if expired {
				msg = "Your console session expired after a time without use: sign in again, then try again. Nothing was changed."
			}
			s.consoleFail(w, r, &Error{Status: http.StatusForbidden, Msg: msg})
			return
		}
		if u.MustChange && r.URL.Path != "/console/account" && r.URL.Path != "/console/logout" {
			if r.Method == http.MethodGet && !consoleWantsJSON(r) {
				http.Redirect(w, r, "/console/account", http.StatusSeeOther)
				return
			}
			s.consoleFail(w, r, &Error{Status: http.StatusForbidden, Msg: "Your password was generated for one sign-in: set a password of your own first."})
			return
		}
		next.ServeHTTP(w, r.WithContext(context.WithValue(r.Context(), userKey, &u)))
	})
}

// requireOwner refuses changes by viewers.
func (s *Server) requireOwner(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if u := consoleUser(r.Context()); u == nil || !u.CanChange() {
			s.consoleFail(w, r, &Error{Status: http.StatusForbidden,
				Msg: "Your account is a viewer's: it can read and export, but only an owner can change a study. Nothing was changed."})
			return
		}
		next.ServeHTTP(w, r)
	})
}

// loginPage is the data of the sign-in page.
type loginPage struct {
	consolePage
	Email   string
	Next    string
	Message string
}

// handleLoginPage shows the sign-in form.
//
// GET /console/login[?next=PATH][&expired=1]
func (s *Server) handleLoginPage(w http.ResponseWriter, r *http.Request) {
	page := loginPage{consolePage: s.page(r, "Sign in", ""), Next: safeNext(r.URL.Query().Get("next"))}
	if r.URL.Query().Get("expired") == "1" {
		page.Message = "Your console session expired after a time without use. Sign in again."
	}
	s.renderConsole(w, r, http.StatusOK, "console_login", page)
}

// handleLogin signs a researcher in. Wrong details answer 403 (RFC 9110
// section 15.5.4: the credentials given are insufficient); too many recent
// failures for the account or the client address answer 429 with
// Retry-After (RFC 6585 section 4) without checking the password at all.
//
// POST /console/login
func (s *Server) handleLogin(w http.ResponseWriter, r *http.Request) {
	if err := parseConsoleForm(w, r); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	email, password := strings.TrimSpace(r.PostForm.Get("email")), r.PostForm.Get("password")
	page := loginPage{consolePage: s.page(r, "Sign in", ""), Email: email, Next: safeNext(r.PostForm.Get("next"))}
	addr := s.clientKey(r)
	now := s.Now()
	byEmail, byAddr, err := s.store.LoginFailures(r.Context(), email, addr, now.Add(-loginWindow))
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	if wait := max(loginWait(byEmail, loginFreeAccount, now), loginWait(byAddr, loginFreeAddress, now)); wait > 0 {
		secs := int(math.Ceil(wait.Seconds()))
		w.Header().Set("Retry-After", strconv.Itoa(secs))
		page.Message = fmt.Sprintf("Too many failed sign-ins for this account or from this address. Wait %s, then try again.", plural(secs, "second"))
		s.renderConsole(w, r, http.StatusTooManyRequests, "console_login", page)
		return
	}
	u, err := s.store.Authenticate(r.Context(), email, password)
	if errors.Is(err, store.ErrBadLogin) {
		if err := s.store.RecordLoginFailure(r.Context(), email, addr); err != nil {
			s.consoleFail(w, r, err)
			return
		}
		s.log.Info("console sign-in failed", slog.String("route", routeOf(r)))
		page.Message = "Wrong e-mail address or password."
		s.renderConsole(w, r, http.StatusForbidden, "console_login", page)
		return
	}
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	token, err := s.store.NewConsoleSession(r.Context(), u.ID)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	http.SetCookie(w, s.sessionCookie(r, token, 0))
	s.log.Info("console sign-in", slog.Int64("user", u.ID))
	next := page.Next
	if u.MustChange {
		next = "/console/account"
	}
	http.Redirect(w, r, next, http.StatusSeeOther)
}

// loginWait is how long after its last failure a key must wait.
func loginWait(f store.Failures, free int, now time.Time) time.Duration {
	if f.N < free {
		return 0
	}
	wait := loginMaxWait
	if n := f.N - free; n < 20 {
		wait = min(time.Second<<n, loginMaxWait)
	}
	return max(f.Last.Add(wait).Sub(now), 0)
}

// safeNext keeps a redirect after sign-in inside the console, so that a
// crafted link cannot send a researcher elsewhere.
func safeNext(next string) string {
	u, err := url.Parse(next)
	if err != nil || next == "" || u.Scheme != "" || u.Host != "" || u.User != nil || strings.HasPrefix(next, "//") || strings.Contains(next, `\`) {
		return "/console/studies"
	}
	u.Path = path.Clean(u.Path)
	if !strings.HasPrefix(u.Path, "/console/") || u.Path == "/console/login" {
		return "/console/studies"
	}
	return u.RequestURI()
}

// handleLogout ends the console session.
//
// POST /console/logout
func (s *Server) handleLogout(w http.ResponseWriter, r *http.Request) {
	if err := s.store.EndConsoleSession(r.Context(), s.consoleToken(r)); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	http.SetCookie(w, s.sessionCookie(r, "", -1))
	http.Redirect(w, r, "/console/login", http.StatusSeeOther)
}

// accountPage is the data of the password page.
type accountPage struct {
	consolePage
	Message    string
	MustChange bool
	Min        int
}

// handleAccountPage shows the form for a new password.
//
// GET /console/account
func (s *Server) handleAccountPage(w http.ResponseWriter, r *http.Request) {
	u := consoleUser(r.Context())
	s.renderConsole(w, r, http.StatusOK, "console_account", accountPage{consolePage: s.page(r, "Your account", ""), MustChange: u.MustChange, Min: store.MinPassword})
}

// handleAccount sets a new password: the current one, then the new one
// twice. Every other console session of the account ends.
//
// POST /console/account
func (s *Server) handleAccount(w http.ResponseWriter, r *http.Request) {
	if err := parseConsoleForm(w, r); err != nil {
		s.consoleFail(w, r, err)
		return
	}
	u := consoleUser(r.Context())
	page := accountPage{consolePage: s.page(r, "Your account", ""), MustChange: u.MustChange, Min: store.MinPassword}
	refuse := func(status int, msg string) {
		page.Message = msg
		s.renderConsole(w, r, status, "console_account", page)
	}
	current, next, again := r.PostForm.Get("current"), r.PostForm.Get("new"), r.PostForm.Get("again")
	if _, err := s.store.Authenticate(r.Context(), u.Email, current); errors.Is(err, store.ErrBadLogin) {
		refuse(http.StatusForbidden, "Your current password is not right. Nothing was changed.")
		return
	} else if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	if next != again {
		refuse(http.StatusUnprocessableEntity, "The two new passwords differ. Nothing was changed.")
		return
	}
	if next == current {
		refuse(http.StatusUnprocessableEntity, "The new password is the current one. Choose another. Nothing was changed.")
		return
	}
	var inv *store.InvalidError
	if err := s.store.SetPassword(r.Context(), u.ID, next, false); errors.As(err, &inv) {
		refuse(http.StatusUnprocessableEntity, "The new password is not accepted: "+inv.Msg+". Nothing was changed.")
		return
	} else if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	token, err := s.store.NewConsoleSession(r.Context(), u.ID)
	if err != nil {
		s.consoleFail(w, r, err)
		return
	}
	http.SetCookie(w, s.sessionCookie(r, token, 0))
	http.Redirect(w, r, "/console/studies?done=password", http.StatusSeeOther)
}

// plural writes a count with its noun.
func plural(n int, noun string) string {
	if n == 1 {
		return "1 " + noun
	}
	return strconv.Itoa(n) + " " + noun + "s"
}
