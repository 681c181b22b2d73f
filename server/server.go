// Package server is Trialogue's HTTP side: routes, handlers, middleware and
// streaming. It turns requests into calls on the experiment (arms) and the
// database (store), and renders pages from web.
package server

import (
	"context"
	"fmt"
	"log/slog"
	"net/http"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/go-chi/chi/v5"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/arms/responder"
	"trialogue/store"
	"trialogue/web"
)

// Config is what the server needs beyond its database and assets.
type Config struct {
	Logger *slog.Logger
	// Getenv reads API keys named by study files (default os.Getenv).
	Getenv func(string) string
	// Demo serves the stand-in survey pages under /demo.
	Demo bool
	// MaxBody bounds request bodies, in bytes (default 64 KiB).
	MaxBody int64
	// Limits are the rate limits on entries and replies (zero: none).
	Limits Limits
	// SyntheticKey, when set, lets a client sending it in the
	// Trialogue-Synthetic header mark its sessions synthetic. Secret.
	SyntheticKey string
	// SecureCookies marks the console's cookie Secure even when requests
	// arrive over plain HTTP, as behind a TLS-terminating proxy.
	SecureCookies bool
	// ConsoleIdle ends console sessions unused for this long (default 30m).
	ConsoleIdle time.Duration
	// ConsoleRefresh is how often the live monitor refreshes (default 5s).
	ConsoleRefresh time.Duration
}

// Server handles respondents' requests for the studies it was given.
type Server struct {
	store  *store.Store
	assets *web.Assets
	log    *slog.Logger
	cfg    Config

	mu       sync.RWMutex
	studies  map[string]*Study // current version, by study id
	versions map[string]*Study // older versions that sessions still run under, by id@version

	locks sessionLocks

	entryLimits, replyLimits *limiters // nil: no limit
	metrics                  *metrics

	// Now is the clock, a seam for tests.
	Now func() time.Time
}

// Study is a study being served: its definition, the version the database
// knows it as, its allocation plan and a responder per endpoint.
type Study struct {
	Def        *arms.Study
	Version    store.StudyVersion
	Plan       *assign.Plan
	Responders map[string]responder.Responder
}

// New returns a server over st.
func New(st *store.Store, assets *web.Assets, cfg Config) *Server {
	if cfg.Logger == nil {
		cfg.Logger = slog.Default()
	}
	if cfg.Getenv == nil {
		cfg.Getenv = os.Getenv
	}
	if cfg.MaxBody == 0 {
		cfg.MaxBody = 64 << 10
	}
	return &Server{store: st, assets: assets, log: cfg.Logger, cfg: cfg,
		studies: map[string]*Study{}, versions: map[string]*Study{}, Now: time.Now,
		entryLimits: newLimiters(cfg.Limits.EntryRate, cfg.Limits.EntryBurst),
		replyLimits: newLimiters(cfg.Limits.ReplyRate, cfg.Limits.ReplyBurst), metrics: newMetrics()}
}

// AddStudy registers a study file with the database (a changed file
// becomes a new version) and starts serving it.
func (s *Server) AddStudy(ctx context.Context, def *arms.Study, source []byte) (*Study, error) {
	sv, err := s.store.RegisterStudy(ctx, def, source)
	if err != nil {
		return nil, err
	}
	st, err := s.build(def, sv)
	if err != nil {
		return nil, err
	}
	s.mu.Lock()
	s.studies[def.ID] = st
	s.mu.Unlock()
	return st, nil
}

func (s *Server) build(def *arms.Study, sv store.StudyVersion) (*Study, error) {
	plan, err := assign.NewPlan(sv.Seed, def.Scheme())
	if err != nil {
		return nil, fmt.Errorf("study %q: %w", def.ID, err)
	}
	resp, err := Responders(def, s.cfg.Getenv)
	if err != nil {
		return nil, err
	}
	for name, r := range resp {
		resp[name] = s.metrics.observeResponder(def.ID, name, r)
	}
	return &Study{Def: def, Version: sv, Plan: plan, Responders: resp}, nil
}

// Responders builds a responder for every endpoint that an arm uses.
// A hosted endpoint whose key variable is named but empty is an error, so
// that a study never starts without its key.
func Responders(def *arms.Study, getenv func(string) string) (map[string]responder.Responder, error) {
	out := map[string]responder.Responder{}
	for _, armName := range def.ArmOrder {
		a := def.Arms[armName]
		if !a.NeedsModel() {
			continue
		}
		if _, done := out[a.Endpoint]; done {
			continue
		}
		e := def.Endpoints[a.Endpoint]
		switch e.Kind {
		case arms.EndpointScripted:
			replies := map[string][]string{}
			for name, other := range def.Arms {
				if other.Endpoint == a.Endpoint && len(other.Script) > 0 {
					replies[name] = other.Script
				}
			}
			out[a.Endpoint] = responder.NewScripted(responder.ScriptedConfig{
				Replies: replies, Chunks: e.Chunks, Delay: time.Duration(e.Delay), Model: e.Model})
		case arms.EndpointOpenAI:
			key := ""
			if e.APIKeyEnv != "" {
				if key = getenv(e.APIKeyEnv); key == "" {
					return nil, fmt.Errorf("study %q: endpoint %q needs its API key in the environment variable %s, which is empty", def.ID, a.Endpoint, e.APIKeyEnv)
				}
			}
			r, err := responder.NewOpenAI(responder.OpenAIConfig{BaseURL: e.BaseURL, APIKey: key,
				Timeout: time.Duration(e.Timeout), MaxAttempts: e.Attempts})
			if err != nil {
				return nil, fmt.Errorf("study %q endpoint %q: %w", def.ID, a.Endpoint, err)
			}
			out[a.Endpoint] = r
		}
	}
	return out, nil
}

// study returns a study by id.
func (s *Server) study(id string) (*Study, bool) {
	s.mu.RLock()
	defer s.mu.RUnlock()
	st, ok := s.studies[id]
	return st, ok
}

// studyOf returns the study version a session runs under: the version it
// entered with, even if the file has changed since.
func (s *Server) studyOf(ctx context.Context, sess store.Session) (*Study, error) {
	cur, ok := s.study(sess.StudyID)
	if !ok {
		return nil, fmt.Errorf("study %q of session is not served: %w", sess.StudyID, store.ErrNotFound)
	}
	if cur.Version.Version == sess.Version {
		return cur, nil
	}
	key := fmt.Sprintf("%s@%d", sess.StudyID, sess.Version)
	s.mu.RLock()
	old, ok := s.versions[key]
	s.mu.RUnlock()
	if ok {
		return old, nil
	}
	canonical, err := s.store.StudyCanonical(ctx, sess.StudyID, sess.Version)
	if err != nil {
		return nil, err
	}
	def, err := arms.FromCanonical(canonical)
	if err != nil {
		return nil, fmt.Errorf("study %s as stored: %w", key, err)
	}
	sv := cur.Version
	sv.Version, sv.Hash = sess.Version, sess.StudyHash
	old, err = s.build(def, sv)
	if err != nil {
		return nil, err
	}
	s.mu.Lock()
	s.versions[key] = old
	s.mu.Unlock()
	return old, nil
}

// Handler returns the routes, with the middleware composed in one place.
func (s *Server) Handler() http.Handler {
	r := chi.NewRouter()
	r.Use(s.recoverer, s.logRequests, s.observe, securityHeaders, compress)
	r.Get("/healthz", func(w http.ResponseWriter, _ *http.Request) { w.Write([]byte("ok\n")) })
	r.Get("/readyz", s.handleReady)
	r.Get("/static/{name}", func(w http.ResponseWriter, r *http.Request) {
		s.assets.ServeStatic(w, r, chi.URLParam(r, "name"))
	})
	r.With(s.limitEntry).Get("/s/{study}", s.handleEntry)
	r.Route("/c/{token}", func(r chi.Router) {
		r.Use(s.withSession)
		r.Get("/", s.handlePage)
		r.Get("/state", s.handleState)
		r.With(s.limitReplies, s.whileOpen).Post("/reply", s.handleReply)
		r.With(s.limitReplies, s.whileOpen).Post("/resume", s.handleResume)
		r.Post("/finish", s.handleFinish)
	})
	r.Route("/console", s.consoleRoutes)
	if s.cfg.Demo {
		r.Get("/demo/host", s.handleDemoHost)
		r.Get("/demo/done", s.handleDemoDone)
	}
	r.NotFound(func(w http.ResponseWriter, r *http.Request) {
		s.fail(w, r, &Error{Status: http.StatusNotFound, Key: "not_found", Msg: "no such page"})
	})
	r.MethodNotAllowed(func(w http.ResponseWriter, r *http.Request) {
		s.fail(w, r, &Error{Status: http.StatusMethodNotAllowed, Key: "not_found", Msg: "method not allowed"})
	})
	return r
}

func (s *Server) handleReady(w http.ResponseWriter, r *http.Request) {
	if err := s.store.Ready(r.Context()); err != nil {
		s.log.Warn("not ready", slog.Any("err", err))
		http.Error(w, "not ready\n", http.StatusServiceUnavailable)
		return
	}
	w.Write([]byte("ready\n"))
}

// sessionLocks serialises the writes of one session inside this process, so
// that a double click or a second tab never makes the model answer twice.
type sessionLocks struct {
	mu    sync.Mutex
	locks map[int64]*sessionLock
}

type sessionLock struct {
	mu   sync.Mutex
	refs int
}

func (l *sessionLocks) lock(id int64) func() {
	l.mu.Lock()
	if l.locks == nil {
		l.locks = map[int64]*sessionLock{}
	}
	sl := l.locks[id]
	if sl == nil {
		sl = &sessionLock{}
		l.locks[id] = sl
	}
	sl.refs++
	l.mu.Unlock()
	sl.mu.Lock()
	return func() {
		sl.mu.Unlock()
		l.mu.Lock()
		if sl.refs--; sl.refs == 0 {
			delete(l.locks, id)
		}
		l.mu.Unlock()
	}
}

// frameAncestors renders a study's frame-ancestors list for CSP.
func frameAncestors(def *arms.Study) string {
	if len(def.FrameAncestors) == 0 {
		return "*"
	}
	return strings.Join(def.FrameAncestors, " ")
}
