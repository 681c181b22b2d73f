package server_test

import (
	"context"
	"io"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/prometheus/common/expfmt"
	"github.com/prometheus/common/model"

	"trialogue/server"
	"trialogue/store"
)

// newConfigFixture is newFixture with a server configuration of the test's
// choosing and a clock the test moves.
func newConfigFixture(t *testing.T, yaml string, cfg server.Config) (*fixture, *fakeClock) {
	t.Helper()
	clock := &fakeClock{now: time.Now()}
	return buildFixture(t, yaml, cfg, clock.Now), clock
}

type fakeClock struct {
	mu  sync.Mutex
	now time.Time
}

func (c *fakeClock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.now
}

func (c *fakeClock) Add(d time.Duration) {
	c.mu.Lock()
	c.now = c.now.Add(d)
	c.mu.Unlock()
}

// get sends a GET without following redirects.
func (f *fixture) get(path string, header map[string]string) *http.Response {
	f.t.Helper()
	req, _ := http.NewRequest("GET", f.http.URL+path, nil)
	for k, v := range header {
		req.Header.Set(k, v)
	}
	res, err := noRedirect.Do(req)
	if err != nil {
		f.t.Fatal(err)
	}
	io.Copy(io.Discard, res.Body)
	res.Body.Close()
	return res
}

// delaySeconds is the delay-seconds form of Retry-After (RFC 9110 section
// 10.2.3: 1*DIGIT).
var delaySeconds = regexp.MustCompile(`^[0-9]+$`)

func (f *fixture) sessionCount() int {
	f.t.Helper()
	s, err := f.st.SessionsOf(context.Background(), f.study.Def.ID, store.WithSynthetic)
	if err != nil {
		f.t.Fatal(err)
	}
	return len(s)
}

func TestEntryRateLimit(t *testing.T) {
	for _, trust := range []bool{false, true} {
		name := "DirectClients"
		if trust {
			name = "BehindProxy"
		}
		t.Run(name, func(t *testing.T) {
			f, clock := newConfigFixture(t, studyYAML("harrow-limit", scriptedEndpoint, chatArm),
				server.Config{Limits: server.Limits{EntryRate: 0.5, EntryBurst: 2, TrustProxy: trust}})
			from := func(addr string) map[string]string {
				return map[string]string{"X-Forwarded-For": "198.51.100.7, " + addr}
			}
			for i, rid := range []string{"L-1", "L-2"} {
				if res := f.get("/s/harrow-limit?rid="+rid+"&lean=left", from("203.0.113.5")); res.StatusCode != http.StatusSeeOther {
					t.Fatalf("entry %d within the burst: got %d, want 303", i+1, res.StatusCode)
				}
			}
			res := f.get("/s/harrow-limit?rid=L-3&lean=left", from("203.0.113.5"))
			t.Run("ErrOverLimit", func(t *testing.T) {
				// RFC 6585 section 4: 429 Too Many Requests, with Retry-After.
				if res.StatusCode != http.StatusTooManyRequests {
					t.Fatalf("got %d, want 429", res.StatusCode)
				}
				if ra := res.Header.Get("Retry-After"); !delaySeconds.MatchString(ra) || ra == "0" {
					t.Fatalf("got Retry-After %q, want a positive delay-seconds", ra)
				}
				if n := f.sessionCount(); n != 2 {
					t.Fatalf("sessions after a refused entry: got %d, want 2", n)
				}
				// the respondent's page says it in the catalogue's words
				req, _ := http.NewRequest("GET", f.http.URL+"/s/harrow-limit?rid=L-5&lean=left", nil)
				req.Header.Set("X-Forwarded-For", "198.51.100.7, 203.0.113.5")
				again, err := noRedirect.Do(req)
				if err != nil {
					t.Fatal(err)
				}
				body, _ := io.ReadAll(again.Body)
				again.Body.Close()
				if again.StatusCode != http.StatusTooManyRequests || !strings.Contains(string(body), "Please wait a moment and try again.") {
					t.Fatalf("got %d, want 429 with the catalogue's text: %.300s", again.StatusCode, body)
				}
			})
			other := f.get("/s/harrow-limit?rid=L-4&lean=left", from("203.0.113.99"))
			if trust {
				t.Run("OKOtherAddressBehindProxy", func(t *testing.T) {
					if other.StatusCode != http.StatusSeeOther {
						t.Fatalf("another client behind the proxy: got %d, want 303", other.StatusCode)
					}
				})
			} else {
				t.Run("ErrForwardedHeaderIgnored", func(t *testing.T) {
					if other.StatusCode != http.StatusTooManyRequests {
						t.Fatalf("a client naming another address without --trust-proxy: got %d, want 429", other.StatusCode)
					}
				})
			}
			clock.Add(2 * time.Second)
			t.Run("OKAfterRetryAfter", func(t *testing.T) {
				if res := f.get("/s/harrow-limit?rid=L-3&lean=left", from("203.0.113.5")); res.StatusCode != http.StatusSeeOther {
					t.Fatalf("after waiting: got %d, want 303", res.StatusCode)
				}
			})
		})
	}
}

func TestReplyRateLimit(t *testing.T) {
	f, clock := newConfigFixture(t, studyYAML("harrow-rlimit", scriptedEndpoint, chatArm),
		server.Config{Limits: server.Limits{ReplyRate: 0.1, ReplyBurst: 1}})
	c := "/c/" + f.enter("R-L1", "left")
	if a := f.call("POST", c+"/resume", nil); a.Status != 200 {
		t.Fatalf("opening: got %d, want 200", a.Status)
	}
	clock.Add(10 * time.Second)
	if a := f.call("POST", c+"/reply", reply("When is the first ferry?", "l1")); a.Status != 200 {
		t.Fatalf("first reply: got %d, want 200", a.Status)
	}
	t.Run("ErrTooSoon", func(t *testing.T) {
		a := f.call("POST", c+"/reply", reply("And the last ferry?", "l2"))
		if a.Status != http.StatusTooManyRequests || a.Rule != "rate_limited" {
			t.Fatalf("got %d %q, want 429 rate_limited", a.Status, a.Rule)
		}
		if st := f.call("GET", c+"/state", nil).State; st.RepliesUsed != 1 {
			t.Fatalf("replies after a refused one: got %d, want 1", st.RepliesUsed)
		}
	})
	t.Run("OKOtherSessionUnaffected", func(t *testing.T) {
		o := "/c/" + f.enter("R-L2", "right")
		if a := f.call("POST", o+"/resume", nil); a.Status != 200 {
			t.Fatalf("another session: got %d, want 200", a.Status)
		}
	})
	clock.Add(10 * time.Second)
	t.Run("OKAfterWaiting", func(t *testing.T) {
		if a := f.call("POST", c+"/reply", reply("And the last ferry?", "l2")); a.Status != 200 || a.State.RepliesUsed != 2 {
			t.Fatalf("got %d with %d replies, want 200 and 2", a.Status, a.State.RepliesUsed)
		}
	})
}

func TestSyntheticMark(t *testing.T) {
	f, _ := newConfigFixture(t, studyYAML("harrow-synth", scriptedEndpoint, chatArm), server.Config{SyntheticKey: "sim-key-for-tests"})
	marked := func(rid string) bool {
		sess, err := f.st.SessionByRID(context.Background(), "harrow-synth", rid)
		if err != nil {
			t.Fatal(err)
		}
		yes, err := f.st.IsSynthetic(context.Background(), sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		return yes
	}
	t.Run("OKWithKey", func(t *testing.T) {
		if res := f.get("/s/harrow-synth?rid=SIM-1&lean=left", map[string]string{server.SyntheticHeader: "sim-key-for-tests"}); res.StatusCode != http.StatusSeeOther || !marked("SIM-1") {
			t.Fatalf("got %d, want 303 and a synthetic session", res.StatusCode)
		}
	})
	t.Run("OKWithoutHeaderIsReal", func(t *testing.T) {
		if res := f.get("/s/harrow-synth?rid=REAL-1&lean=left", nil); res.StatusCode != http.StatusSeeOther || marked("REAL-1") {
			t.Fatalf("got %d, want 303 and a real session", res.StatusCode)
		}
	})
	t.Run("ErrWrongKey", func(t *testing.T) {
		if res := f.get("/s/harrow-synth?rid=SIM-2&lean=left", map[string]string{server.SyntheticHeader: "guess"}); res.StatusCode != http.StatusForbidden {
			t.Fatalf("got %d, want 403", res.StatusCode)
		}
		if _, err := f.st.SessionByRID(context.Background(), "harrow-synth", "SIM-2"); err == nil {
			t.Fatalf("a refused synthetic entry created a session")
		}
	})
	t.Run("ErrServerWithoutKey", func(t *testing.T) {
		g, _ := newConfigFixture(t, studyYAML("harrow-nokey", scriptedEndpoint, chatArm), server.Config{})
		if res := g.get("/s/harrow-nokey?rid=SIM-3&lean=left", map[string]string{server.SyntheticHeader: ""}); res.StatusCode != http.StatusSeeOther {
			t.Fatalf("an empty header: got %d, want 303 as a real respondent", res.StatusCode)
		}
		if res := g.get("/s/harrow-nokey?rid=SIM-4&lean=left", map[string]string{server.SyntheticHeader: "anything"}); res.StatusCode != http.StatusForbidden {
			t.Fatalf("got %d, want 403 from a server started without a synthetic key", res.StatusCode)
		}
		if n := g.sessionCount(); n != 1 {
			t.Fatalf("sessions: got %d, want 1", n)
		}
	})
	t.Run("OKLeftOutOfCounts", func(t *testing.T) {
		counts, err := f.st.ArmCounts(context.Background(), "harrow-synth", store.RealOnly)
		if err != nil || counts["only"] != 1 {
			t.Fatalf("real sessions per arm: got %v %v, want only=1", counts, err)
		}
	})
}

// TestMetrics checks /metrics against the Prometheus text exposition format
// (parsed with the Prometheus project's own parser, prometheus/common/expfmt)
// and that no token reaches it.
func TestMetrics(t *testing.T) {
	f, _ := newConfigFixture(t, studyYAML("harrow-metrics", scriptedEndpoint, chatArm), server.Config{})
	tok := f.enter("R-M1", "left")
	f.call("POST", "/c/"+tok+"/resume", nil)
	f.call("POST", "/c/"+tok+"/reply", reply("When is the first ferry?", "m1"))
	f.get("/c/AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA/state", nil)
	ms := httptest.NewServer(f.srv.MetricsHandler())
	defer ms.Close()
	res, err := http.Get(ms.URL)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	body, _ := io.ReadAll(res.Body)
	if ct := res.Header.Get("Content-Type"); !strings.HasPrefix(ct, "text/plain; version=0.0.4") {
		t.Fatalf("got Content-Type %q, want the text format's text/plain; version=0.0.4", ct)
	}
	p := expfmt.NewTextParser(model.LegacyValidation)
	fams, err := p.TextToMetricFamilies(strings.NewReader(string(body)))
	if err != nil {
		t.Fatalf("not the Prometheus text format: %v", err)
	}
	value := func(name string, labels map[string]string) float64 {
		fam, ok := fams[name]
		if !ok {
			t.Fatalf("no metric %s", name)
		}
	next:
		for _, m := range fam.Metric {
			for _, lp := range m.Label {
				if want, ok := labels[lp.GetName()]; ok && want != lp.GetValue() {
					continue next
				}
			}
			switch {
			case m.Counter != nil:
				return m.Counter.GetValue()
			case m.Gauge != nil:
				return m.Gauge.GetValue()
			case m.Histogram != nil:
				return float64(m.Histogram.GetSampleCount())
			}
		}
		return 0
	}
	for _, tc := range []struct {
		name   string
		labels map[string]string
		want   float64
	}{
		{"trialogue_assignments_total", map[string]string{"study": "harrow-metrics", "arm": "only", "synthetic": "false"}, 1},
		{"trialogue_turn_seconds", map[string]string{"route": "/c/{token}/reply"}, 1},
		{"trialogue_turn_seconds", map[string]string{"route": "/c/{token}/resume"}, 1},
		{"trialogue_model_seconds", map[string]string{"study": "harrow-metrics", "endpoint": "bot"}, 2},
		{"trialogue_http_requests_total", map[string]string{"route": "/s/{study}", "code": "303"}, 1},
		{"trialogue_http_requests_total", map[string]string{"code": "404"}, 1},
		{"trialogue_sessions_active", nil, 1},
	} {
		if got := value(tc.name, tc.labels); got != tc.want {
			t.Errorf("%s%v: got %v, want %v", tc.name, tc.labels, got, tc.want)
		}
	}
	if _, ok := fams["process_resident_memory_bytes"]; !ok {
		t.Errorf("no process_resident_memory_bytes")
	}
	if strings.Contains(string(body), tok) || strings.Contains(string(body), "R-M1") {
		t.Fatalf("the metrics hold a token or a respondent id")
	}
}
