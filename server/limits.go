package server

import (
	"crypto/subtle"
	"math"
	"net"
	"net/http"
	"net/netip"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/go-chi/chi/v5"
	"golang.org/x/time/rate"
)

// Limits are the request rates the server allows. A zero rate means no
// limit, which is what tests and load runs on loopback use.
type Limits struct {
	EntryRate  float64 // entries per second per client address
	EntryBurst int     // entries a client address may make at once
	ReplyRate  float64 // replies and retries per second per session
	ReplyBurst int     // replies and retries a session may send at once
	// TrustProxy takes the client address from the last X-Forwarded-For
	// entry, the one the reverse proxy in front added. Set it only behind
	// such a proxy: otherwise any client could name its own address.
	TrustProxy bool
}

// SyntheticHeader is the request header by which `trialogue simulate`
// marks its sessions as synthetic. It must carry the server's synthetic
// key; without one configured no session can be marked.
const SyntheticHeader = "Trialogue-Synthetic"

// limiters holds a token bucket per key (a client address or a session
// token) and forgets keys idle for longer than idle, so that memory stays
// bounded however many addresses pass.
type limiters struct {
	rate  rate.Limit
	burst int
	idle  time.Duration

	mu        sync.Mutex
	m         map[string]*limiterEntry
	lastSweep time.Time
}

type limiterEntry struct {
	lim  *rate.Limiter
	seen time.Time
}

func newLimiters(perSecond float64, burst int) *limiters {
	if perSecond <= 0 {
		return nil
	}
	return &limiters{rate: rate.Limit(perSecond), burst: max(burst, 1), idle: 10 * time.Minute, m: map[string]*limiterEntry{}}
}

// wait reports how long key must wait before its next request is allowed;
// zero means it is allowed now (and counted).
func (l *limiters) wait(key string, now time.Time) time.Duration {
	l.mu.Lock()
	defer l.mu.Unlock()
	if now.Sub(l.lastSweep) > time.Minute {
		for k, e := range l.m {
			if now.Sub(e.seen) > l.idle {
				delete(l.m, k)
			}
		}
		l.lastSweep = now
	}
	e := l.m[key]
	if e == nil {
		e = &limiterEntry{lim: rate.NewLimiter(l.rate, l.burst)}
		l.m[key] = e
	}
	e.seen = now
	res := e.lim.ReserveN(now, 1)
	if d := res.DelayFrom(now); d > 0 {
		res.CancelAt(now)
		return d
	}
	return 0
}

// tooMany answers 429 with a Retry-After in whole seconds (RFC 6585
// section 4; delay-seconds of RFC 9110 section 10.2.3), rounded up.
func (s *Server) tooMany(w http.ResponseWriter, r *http.Request, wait time.Duration) {
	w.Header().Set("Retry-After", strconv.Itoa(int(math.Ceil(wait.Seconds()))))
	s.fail(w, r, &Error{Status: http.StatusTooManyRequests, Key: "rate_limited", Rule: "rate_limited",
		Msg: "too many requests; wait a moment and try again"})
}

// limitEntry limits entries per client address.
func (s *Server) limitEntry(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if s.entryLimits != nil {
			if d := s.entryLimits.wait(s.clientKey(r), s.Now()); d > 0 {
				s.tooMany(w, r, d)
				return
			}
		}
		next.ServeHTTP(w, r)
	})
}

// limitReplies limits replies and retries per session.
func (s *Server) limitReplies(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if s.replyLimits != nil {
			if d := s.replyLimits.wait(chi.URLParam(r, "token"), s.Now()); d > 0 {
				s.tooMany(w, r, d)
				return
			}
		}
		next.ServeHTTP(w, r)
	})
}

// clientKey is the address a request's limits are counted under: the peer,
// or with TrustProxy the last X-Forwarded-For entry. IPv6 addresses count
// by their /64 network, which common practice assigns to one site or host.
func (s *Server) clientKey(r *http.Request) string {
	host := r.RemoteAddr
	if h, _, err := net.SplitHostPort(host); err == nil {
		host = h
	}
	if s.cfg.Limits.TrustProxy {
		if xff := r.Header.Values("X-Forwarded-For"); len(xff) > 0 {
			parts := strings.Split(xff[len(xff)-1], ",")
			if last := strings.TrimSpace(parts[len(parts)-1]); last != "" {
				host = last
			}
		}
	}
	addr, err := netip.ParseAddr(host)
	if err != nil {
		return host
	}
	addr = addr.Unmap()
	if addr.Is6() {
		if p, err := addr.Prefix(64); err == nil {
			return p.String()
		}
	}
	return addr.String()
}

// syntheticMark reads the synthetic header of an entry: absent is a real
// respondent; present, it must match the server's key in constant time.
func (s *Server) syntheticMark(r *http.Request) (bool, error) {
	v := r.Header.Get(SyntheticHeader)
	if v == "" {
		return false, nil
	}
	if s.cfg.SyntheticKey == "" || subtle.ConstantTimeCompare([]byte(v), []byte(s.cfg.SyntheticKey)) != 1 {
		return false, &Error{Status: http.StatusForbidden, Key: "not_found", Field: SyntheticHeader,
			Msg: "this server does not accept synthetic respondents with that key"}
	}
	return true, nil
}
