package main

import (
	"context"
	"crypto/tls"
	"errors"
	"flag"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"regexp"
	"strings"
	"time"

	"trialogue/arms"
	"trialogue/server"
	"trialogue/store"
	"trialogue/web"
)

// Config says where Trialogue runs; the study files say what it runs.
type Config struct {
	Addr            string        // listen address
	DB              string        // SQLite file or postgres:// URL
	Studies         []string      // study files
	Demo            bool          // serve the stand-in survey pages and point returns at them
	Synchronous     string        // SQLite synchronous pragma: FULL (when empty) or NORMAL
	LogFormat       string        // text or json
	ShutdownTimeout time.Duration // how long replies in flight may take to finish on SIGTERM
	MetricsAddr     string        // where Prometheus /metrics is served; empty: nowhere
	TLSCert, TLSKey string        // PEM files; both set: serve HTTPS
	Limits          server.Limits // rate limits on entries and replies; TrustProxy is --trust-proxy
	SyntheticKey    string        // secret, from TRIALOGUE_SYNTHETIC_KEY: lets trialogue simulate mark its sessions
	SecureCookies   bool          // the console's cookie is Secure even over plain HTTP (behind a TLS proxy)
	ConsoleRefresh  time.Duration // how often the console's monitor refreshes; 0: every 5s
}

// Main is the program wired together: tests build one with a temporary
// database and call Run, just as the command does.
type Main struct {
	Config Config
	Stdout io.Writer
	Logger *slog.Logger

	Store    *store.Store
	Server   *server.Server
	HTTP     *http.Server
	Listener net.Listener
	Metrics  *http.Server // the --metrics-addr server, if any
	served   chan error
}

// stringList is a repeatable flag.
type stringList []string

func (l *stringList) String() string     { return strings.Join(*l, ",") }
func (l *stringList) Set(v string) error { *l = append(*l, v); return nil }

// ParseFlags reads the serve or demo command's flags.
func (m *Main) ParseFlags(args []string, demo bool, stderr io.Writer) error {
	name := "serve"
	c := Config{Addr: "127.0.0.1:8080", DB: "trialogue.db", LogFormat: "text", ShutdownTimeout: 30 * time.Second}
	if demo {
		name, c.Demo, c.DB = "demo", true, "trialogue-demo.db"
	}
	fs := flag.NewFlagSet("trialogue "+name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.StringVar(&c.Addr, "addr", c.Addr, "listen `address`")
	fs.StringVar(&c.DB, "db", c.DB, "database: a SQLite `file` (created if missing), or a postgres:// URL that replicas share")
	var studies stringList
	fs.Var(&studies, "study", "study `file` to serve (repeatable)")
	fs.StringVar(&c.Synchronous, "synchronous", c.Synchronous, "SQLite synchronous `mode`: FULL (default; durable across power loss) or NORMAL")
	fs.StringVar(&c.LogFormat, "log-format", c.LogFormat, "log `format`: text or json")
	fs.DurationVar(&c.ShutdownTimeout, "shutdown-timeout", c.ShutdownTimeout, "time replies in flight may take to finish on SIGTERM")
	c.Limits = server.Limits{EntryRate: 2, EntryBurst: 20, ReplyRate: 1, ReplyBurst: 5}
	fs.StringVar(&c.MetricsAddr, "metrics-addr", "", "serve Prometheus /metrics on this `address` (keep it private)")
	fs.StringVar(&c.TLSCert, "tls-cert", "", "TLS certificate `file` (PEM); with --tls-key, serve HTTPS")
	fs.StringVar(&c.TLSKey, "tls-key", "", "TLS private key `file` (PEM)")
	fs.Float64Var(&c.Limits.EntryRate, "entry-rate", c.Limits.EntryRate, "entries per second per client address (0: no limit)")
	fs.IntVar(&c.Limits.EntryBurst, "entry-burst", c.Limits.EntryBurst, "entries a client address may make at once")
	fs.Float64Var(&c.Limits.ReplyRate, "reply-rate", c.Limits.ReplyRate, "replies and retries per second per session (0: no limit)")
	fs.IntVar(&c.Limits.ReplyBurst, "reply-burst", c.Limits.ReplyBurst, "replies and retries a session may send at once")
	fs.BoolVar(&c.Limits.TrustProxy, "trust-proxy", false, "take client addresses from X-Forwarded-For (only behind a proxy that sets it)")
	fs.BoolVar(&c.SecureCookies, "secure-cookies", false, "mark the console's cookie Secure over plain HTTP too (behind a TLS-terminating proxy)")
	if err := fs.Parse(args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return fmt.Errorf("unexpected argument %q (study files go after --study)", fs.Arg(0))
	}
	c.Studies = studies
	if demo && len(c.Studies) == 0 {
		c.Studies = []string{defaultDemoStudy()}
	}
	if len(c.Studies) == 0 {
		return errors.New("no study to serve: give one with --study FILE")
	}
	if c.LogFormat != "text" && c.LogFormat != "json" {
		return fmt.Errorf("--log-format must be text or json, not %q", c.LogFormat)
	}
	if (c.TLSCert == "") != (c.TLSKey == "") {
		return errors.New("--tls-cert and --tls-key go together: give both or neither")
	}
	if c.Limits.EntryRate < 0 || c.Limits.ReplyRate < 0 || c.Limits.EntryBurst < 1 || c.Limits.ReplyBurst < 1 {
		return errors.New("--entry-rate and --reply-rate must not be negative, --entry-burst and --reply-burst at least 1")
	}
	c.SyntheticKey = os.Getenv("TRIALOGUE_SYNTHETIC_KEY")
	m.Config = c
	return nil
}

// defaultDemoStudy finds the bundled demo study: in the source tree, or
// where the container image puts it.
func defaultDemoStudy() string {
	for _, p := range []string{"testdata/demo-study.yaml", "/usr/share/trialogue/demo-study.yaml"} {
		if _, err := os.Stat(p); err == nil {
			return p
		}
	}
	return "testdata/demo-study.yaml"
}

// Run opens the database, loads the studies and starts serving. It returns
// once the server listens; Close stops it.
func (m *Main) Run(ctx context.Context) error {
	if m.Stdout == nil {
		m.Stdout = io.Discard
	}
	if m.Logger == nil {
		m.Logger = slog.New(slog.NewTextHandler(io.Discard, nil))
	}
	type loaded struct {
		def *arms.Study
		src []byte
	}
	var defs []loaded
	for _, path := range m.Config.Studies {
		def, src, err := arms.ParseFile(path)
		if err != nil {
			return err
		}
		defs = append(defs, loaded{def, src})
	}
	assets, err := web.Load()
	if err != nil {
		return err
	}
	if m.Config.TLSCert != "" {
		if _, err := tls.LoadX509KeyPair(m.Config.TLSCert, m.Config.TLSKey); err != nil {
			return fmt.Errorf("TLS certificate and key: %w", err)
		}
	}
	// The database first: nothing listens until it answers and its schema
	// is current, so a load balancer never sees a half-started replica.
	st, err := store.Open(ctx, m.Config.DB, store.Options{Synchronous: m.Config.Synchronous})
	if err != nil {
		return err
	}
	ln, err := net.Listen("tcp", m.Config.Addr)
	if err != nil {
		st.Close()
		return fmt.Errorf("listen on %s: %w", m.Config.Addr, err)
	}
	m.Listener = ln
	m.Store = st
	m.Server = server.New(st, assets, server.Config{Logger: m.Logger, Demo: m.Config.Demo,
		Limits: m.Config.Limits, SyntheticKey: m.Config.SyntheticKey,
		SecureCookies: m.Config.SecureCookies, ConsoleRefresh: m.Config.ConsoleRefresh})
	hostSite, frameSite := server.DemoSites(ln.Addr())
	for _, d := range defs {
		if m.Config.Demo {
			// The demo returns respondents to its own stand-in survey page:
			// it serves a copy of the file whose return address points there,
			// so that the stored file and its hash still agree.
			src, err := demoSource(d.src, hostSite)
			if err == nil {
				d.def, err = arms.Parse(d.def.ID+" (demo copy)", src)
			}
			if err != nil {
				m.Close()
				return err
			}
			d.src = src
		}
		if _, err := m.Server.AddStudy(ctx, d.def, d.src); err != nil {
			m.Close()
			return err
		}
	}
	m.HTTP = &http.Server{
		Handler:           m.Server.Handler(),
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       30 * time.Second,
		IdleTimeout:       120 * time.Second,
		MaxHeaderBytes:    32 << 10,
		ErrorLog:          slog.NewLogLogger(m.Logger.Handler(), slog.LevelWarn),
	}
	m.served = make(chan error, 1)
	scheme := "http"
	if m.Config.TLSCert != "" {
		scheme = "https"
		go func() { m.served <- m.HTTP.ServeTLS(ln, m.Config.TLSCert, m.Config.TLSKey) }()
	} else {
		go func() { m.served <- m.HTTP.Serve(ln) }()
	}
	if m.Config.MetricsAddr != "" {
		if err := m.serveMetrics(); err != nil {
			m.Close()
			return err
		}
	}
	m.Logger.Info("serving", slog.String("addr", ln.Addr().String()), slog.String("db", st.Path()), slog.Int("studies", len(defs)))
	if m.Config.Demo {
		d := defs[0].def
		ex := d.Example()
		fmt.Fprintf(m.Stdout, "Trialogue demo: study %q (%s), scripted responder, database %s\n\n", d.ID, d.Title, st.Path())
		fmt.Fprintf(m.Stdout, "  Stand-in survey page (embeds the respondent page in an iframe):\n    %s/demo/host\n\n", hostSite)
		fmt.Fprintf(m.Stdout, "  A respondent link (open it directly):\n    %s/s/%s?rid=demo-%d", frameSite, d.ID, time.Now().Unix()%100000)
		for _, c := range d.Covariates {
			if v := ex.Covariates[c.Name]; v != "" && c.Type != arms.TypeText {
				fmt.Fprintf(m.Stdout, "&%s=%s", c.Name, v)
			}
		}
		fmt.Fprint(m.Stdout, "\n\n")
		email, password, err := demoOwner(ctx, m.Store)
		if err != nil {
			m.Close()
			return err
		}
		fmt.Fprintf(m.Stdout, "  Researcher console (an owner account of this demo; its password is new at every start):\n    %s/console/login\n    e-mail %s, password %s\n\n", hostSite, email, password)
	} else {
		fmt.Fprintf(m.Stdout, "Trialogue serving %d stud(ies) on %s://%s\n\n", len(defs), scheme, ln.Addr())
	}
	fmt.Fprint(m.Stdout, cautions)
	return nil
}

var (
	returnLine = regexp.MustCompile(`(?m)^return:.*$`)
	parentLine = regexp.MustCompile(`(?m)^parent_origin:.*\n?`)
)

// demoSource rewrites a study file's return address and parent origin to
// the demo's stand-in survey page on hostSite.
func demoSource(src []byte, hostSite string) ([]byte, error) {
	if !returnLine.Match(src) {
		return nil, errors.New("demo: the study file has no top-level return: line to point at the stand-in survey page")
	}
	src = parentLine.ReplaceAll(src, nil)
	line := fmt.Sprintf("return: %q\nparent_origin: %q", hostSite+"/demo/done?rid={{.rid}}&code={{.code}}&arm={{.arm_code}}&study={{.study}}", hostSite)
	return returnLine.ReplaceAllLiteral(src, []byte(line)), nil
}

// serveMetrics serves /metrics on its own address, for researchers only.
func (m *Main) serveMetrics() error {
	ln, err := net.Listen("tcp", m.Config.MetricsAddr)
	if err != nil {
		return fmt.Errorf("listen on %s for metrics: %w", m.Config.MetricsAddr, err)
	}
	mux := http.NewServeMux()
	mux.Handle("GET /metrics", m.Server.MetricsHandler())
	m.Metrics = &http.Server{Handler: mux, ReadHeaderTimeout: 10 * time.Second, ReadTimeout: 30 * time.Second,
		WriteTimeout: 30 * time.Second, ErrorLog: slog.NewLogLogger(m.Logger.Handler(), slog.LevelWarn)}
	go m.Metrics.Serve(ln)
	m.Logger.Info("serving metrics", slog.String("addr", ln.Addr().String()))
	return nil
}

// Wait blocks until ctx ends (a signal) or the server fails.
func (m *Main) Wait(ctx context.Context) error {
	select {
	case <-ctx.Done():
		return nil
	case err := <-m.served:
		if errors.Is(err, http.ErrServerClosed) {
			return nil
		}
		return err
	}
}

// Close stops taking requests, lets those in flight finish up to the
// shutdown timeout, and closes the database.
func (m *Main) Close() error {
	var errs []error
	if m.HTTP != nil {
		ctx, cancel := context.WithTimeout(context.Background(), m.Config.ShutdownTimeout)
		defer cancel()
		if err := m.HTTP.Shutdown(ctx); err != nil {
			errs = append(errs, fmt.Errorf("shutdown: %w", err))
		}
	} else if m.Listener != nil {
		m.Listener.Close()
	}
	if m.Metrics != nil {
		m.Metrics.Close()
	}
	if m.Store != nil {
		errs = append(errs, m.Store.Close())
	}
	return errors.Join(errs...)
}

// cautions are shown whenever Trialogue starts serving.
const cautions = `Before fielding a study with real people:
  - run it only with ethics-board (IRB) approval and the participants' informed consent;
  - tell respondents honestly that replies come from an AI model, and debrief them afterwards;
  - respondents type free text that can hold personal details: follow your data-protection rules;
  - do not use Trialogue to target real voters or patients outside an approved study;
  - local rules and your board's judgement come first: Trialogue records, it does not decide.

`

func runServe(ctx context.Context, args []string, stdout, stderr io.Writer, demo bool) int {
	m := &Main{Stdout: stdout}
	if err := m.ParseFlags(args, demo, stderr); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitUsage
	}
	var h slog.Handler = slog.NewTextHandler(stderr, nil)
	if m.Config.LogFormat == "json" {
		h = slog.NewJSONHandler(stderr, nil)
	}
	m.Logger = slog.New(h)
	if err := m.Run(ctx); err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		var probs *arms.Problems
		if errors.As(err, &probs) {
			return exitUsage
		}
		return exitFail
	}
	err := m.Wait(ctx)
	m.Logger.Info("shutting down")
	if cerr := m.Close(); cerr != nil {
		err = errors.Join(err, cerr)
	}
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	return exitOK
}
