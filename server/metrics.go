package server

import (
	"context"
	"errors"
	"net/http"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/go-chi/chi/v5"
	"github.com/go-chi/chi/v5/middleware"
	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"

	"trialogue/arms/responder"
)

// activeWindow is how recently a session must have made a request to count
// as active.
const activeWindow = 5 * time.Minute

// metrics are the server's Prometheus metrics, in a registry of its own so
// that several servers (tests) can live in one process.
type metrics struct {
	reg       *prometheus.Registry
	requests  *prometheus.CounterVec
	turns     *prometheus.HistogramVec
	overhead  prometheus.Histogram
	model     *prometheus.HistogramVec
	modelErrs *prometheus.CounterVec
	retries   *prometheus.CounterVec
	assigned  *prometheus.CounterVec

	mu     sync.Mutex
	active map[string]time.Time // session token → last request; in memory only, never exported
}

// turnBuckets cover a model turn: from a scripted reply in milliseconds to
// a hosted model retrying for a minute, in seconds.
var turnBuckets = []float64{0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1, 2, 3, 5, 8, 13, 21, 34, 60, 120}

func newMetrics() *metrics {
	m := &metrics{reg: prometheus.NewRegistry(), active: map[string]time.Time{}}
	m.requests = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "trialogue_http_requests_total",
		Help: "HTTP requests answered, by route pattern, method and status code."}, []string{"route", "method", "code"})
	m.turns = prometheus.NewHistogramVec(prometheus.HistogramOpts{Name: "trialogue_turn_seconds",
		Help: "Time to answer a reply or a retry, model time included, by route.", Buckets: turnBuckets}, []string{"route"})
	m.overhead = prometheus.NewHistogram(prometheus.HistogramOpts{Name: "trialogue_turn_overhead_seconds",
		Help:    "The server's own time per model turn: request to answer, less the model's time.",
		Buckets: []float64{0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1}})
	m.model = prometheus.NewHistogramVec(prometheus.HistogramOpts{Name: "trialogue_model_seconds",
		Help: "Time the model endpoint took per turn, retries and backoff included.", Buckets: turnBuckets}, []string{"study", "endpoint"})
	m.modelErrs = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "trialogue_model_errors_total",
		Help: "Model turns that failed after every attempt, by kind."}, []string{"study", "endpoint", "kind"})
	m.retries = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "trialogue_model_retries_total",
		Help: "Failed model attempts that were retried."}, []string{"study", "endpoint"})
	m.assigned = prometheus.NewCounterVec(prometheus.CounterOpts{Name: "trialogue_assignments_total",
		Help: "New sessions assigned, by study, arm and whether synthetic."}, []string{"study", "arm", "synthetic"})
	active := prometheus.NewGaugeFunc(prometheus.GaugeOpts{Name: "trialogue_sessions_active",
		Help: "Sessions that made a request in the last five minutes."}, m.countActive)
	m.reg.MustRegister(m.requests, m.turns, m.overhead, m.model, m.modelErrs, m.retries, m.assigned, active,
		collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	return m
}

func (m *metrics) countActive() float64 {
	m.mu.Lock()
	defer m.mu.Unlock()
	now := time.Now()
	for k, at := range m.active {
		if now.Sub(at) > activeWindow {
			delete(m.active, k)
		}
	}
	return float64(len(m.active))
}

func (m *metrics) seen(token string) {
	m.mu.Lock()
	m.active[token] = time.Now()
	if len(m.active) > 200_000 { // bound memory under a flood of guessed tokens
		m.active = map[string]time.Time{}
	}
	m.mu.Unlock()
}

// MetricsHandler serves the metrics in the Prometheus text exposition
// format. Serve it only where researchers alone can reach it.
func (s *Server) MetricsHandler() http.Handler {
	return promhttp.HandlerFor(s.metrics.reg, promhttp.HandlerOpts{})
}

// observe counts requests by route pattern (never the address, which holds
// tokens and respondent ids) and times replies and retries.
func (s *Server) observe(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		ww := middleware.NewWrapResponseWriter(w, r.ProtoMajor)
		next.ServeHTTP(ww, r)
		route := routeOf(r)
		s.metrics.requests.WithLabelValues(route, r.Method, strconv.Itoa(ww.Status())).Inc()
		if !strings.HasPrefix(route, "/c/{token}") || ww.Status() == http.StatusNotFound {
			return
		}
		s.metrics.seen(chi.URLParam(r, "token"))
		if (strings.HasSuffix(route, "/reply") || strings.HasSuffix(route, "/resume")) && ww.Status() == http.StatusOK {
			s.metrics.turns.WithLabelValues(route).Observe(time.Since(start).Seconds())
		}
	})
}

// observedResponder records a responder's time, retries and failures.
type observedResponder struct {
	responder.Responder
	m               *metrics
	study, endpoint string
}

func (m *metrics) observeResponder(study, endpoint string, r responder.Responder) responder.Responder {
	return observedResponder{Responder: r, m: m, study: study, endpoint: endpoint}
}

// Respond calls the responder and records what it took.
func (o observedResponder) Respond(ctx context.Context, req responder.Request, sink responder.Sink) (responder.Result, error) {
	res, err := o.Responder.Respond(ctx, req, sink)
	o.m.model.WithLabelValues(o.study, o.endpoint).Observe(res.ModelTime.Seconds())
	if res.Retries > 0 {
		o.m.retries.WithLabelValues(o.study, o.endpoint).Add(float64(res.Retries))
	}
	if err != nil {
		kind := "internal"
		var me *responder.Error
		if errors.As(err, &me) {
			kind = me.Kind
		}
		o.m.modelErrs.WithLabelValues(o.study, o.endpoint, kind).Inc()
	}
	return res, err
}

// CloseIdleConnections closes the endpoint's kept-alive connections, if it
// has any.
func (o observedResponder) CloseIdleConnections() {
	if c, ok := o.Responder.(interface{ CloseIdleConnections() }); ok {
		c.CloseIdleConnections()
	}
}

// assignedMetric counts a new session's arm.
func (s *Server) assignedMetric(study, arm string, synthetic bool) {
	s.metrics.assigned.WithLabelValues(study, arm, strconv.FormatBool(synthetic)).Inc()
}
