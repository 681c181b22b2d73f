package server_test

import (
	"archive/zip"
	"context"
	"encoding/csv"
	"encoding/json"
	"encoding/xml"
	"fmt"
	"io"
	"math"
	"net/http"
	"net/http/cookiejar"
	"net/http/httptest"
	"net/url"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"trialogue/server"
	"trialogue/store"
)

// consoleStudy is a one-arm chat study with a fielding block that meets
// the go-live checklist once the ethics reference is entered and two pilot
// transcripts are reviewed; it has no probes, so no drift check is due.
func consoleStudy(id string) string {
	return studyYAML(id, scriptedEndpoint, chatArm) + `frame_ancestors: ["https://survey.example.org"]
fielding:
  pilot_cap: 4
  pilot_reviews: 2
  consent: "You agree to talk about the Harrow Bay ferry for a few minutes."
  debriefing: "Thank you. The replies came from an AI model."
  ai_disclosure: page
  dropout_after: 10m
  close_grace: 30m
  prices: {bot: {input: 2, output: 4}}
  currency: EUR
`
}

const (
	ownerEmail  = "owner@example.org"
	viewerEmail = "viewer@example.org"
	consolePW   = "harrow-bay-ferry-desk-7"
)

// consoleFixture is a served study with an owner and a viewer account and
// a clock that the server and the store share.
func consoleFixture(t *testing.T, cfg server.Config) (*fixture, *fakeClock) {
	t.Helper()
	f, clock := newConfigFixture(t, consoleStudy("harrow-console"), cfg)
	f.st.Now = clock.Now
	for _, u := range []struct{ email, role string }{{ownerEmail, store.RoleOwner}, {viewerEmail, store.RoleViewer}} {
		if _, err := f.st.AddUser(context.Background(), u.email, u.role, consolePW, false); err != nil {
			t.Fatal(err)
		}
	}
	return f, clock
}

// browserish is a client with a cookie jar that does not follow redirects.
type browserish struct {
	t    *testing.T
	base string
	c    *http.Client
}

func newBrowserish(t *testing.T, base string, hc *http.Client) *browserish {
	t.Helper()
	jar, err := cookiejar.New(nil)
	if err != nil {
		t.Fatal(err)
	}
	c := &http.Client{Jar: jar, CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	if hc != nil {
		c.Transport = hc.Transport
	}
	return &browserish{t: t, base: base, c: c}
}

func (b *browserish) do(method, path string, form url.Values, header map[string]string) (*http.Response, string) {
	b.t.Helper()
	var body io.Reader
	if form != nil {
		body = strings.NewReader(form.Encode())
	}
	req, err := http.NewRequest(method, b.base+path, body)
	if err != nil {
		b.t.Fatal(err)
	}
	if form != nil {
		req.Header.Set("Content-Type", "application/x-www-form-urlencoded")
	}
	for k, v := range header {
		req.Header.Set(k, v)
	}
	res, err := b.c.Do(req)
	if err != nil {
		b.t.Fatal(err)
	}
	defer res.Body.Close()
	raw, err := io.ReadAll(res.Body)
	if err != nil {
		b.t.Fatal(err)
	}
	return res, string(raw)
}

func (b *browserish) get(path string) (*http.Response, string) { return b.do("GET", path, nil, nil) }

func (b *browserish) post(path string, form url.Values) (*http.Response, string) {
	return b.do("POST", path, form, nil)
}

// signIn signs in and fails unless it is redirected into the console.
func (b *browserish) signIn(email string) {
	b.t.Helper()
	res, body := b.post("/console/login", url.Values{"email": {email}, "password": {consolePW}, "next": {"/console/studies"}})
	if res.StatusCode != http.StatusSeeOther || res.Header.Get("Location") != "/console/studies" {
		b.t.Fatalf("sign in as %s: got %d to %q, want 303 to /console/studies; %.300s", email, res.StatusCode, res.Header.Get("Location"), body)
	}
}

func mustStatus(t *testing.T, res *http.Response, body string, want int) {
	t.Helper()
	if res.StatusCode != want {
		t.Fatalf("%s %s: got status %d, want %d; %.400s", res.Request.Method, res.Request.URL.Path, res.StatusCode, want, body)
	}
}

func phaseOf(t *testing.T, f *fixture) string {
	t.Helper()
	p, err := f.st.Phase(context.Background(), f.study.Def.ID)
	if err != nil {
		t.Fatal(err)
	}
	return p
}

// TestConsoleSignIn: sign-in, the session cookie's attributes, slowing of
// failed sign-ins, idle expiry and signing out.
func TestConsoleSignIn(t *testing.T) {
	f, clock := consoleFixture(t, server.Config{})
	b := newBrowserish(t, f.http.URL, nil)
	t.Run("OKRedirectToSignIn", func(t *testing.T) {
		res, _ := b.get("/console/studies/harrow-console/monitor")
		// RFC 9110 section 15.4.4: 303 See Other sends the browser to
		// another resource with GET.
		if res.StatusCode != http.StatusSeeOther || res.Header.Get("Location") != "/console/login?next=%2Fconsole%2Fstudies%2Fharrow-console%2Fmonitor" {
			t.Fatalf("got %d to %q, want 303 to the sign-in page with next", res.StatusCode, res.Header.Get("Location"))
		}
	})
	t.Run("ErrWrongPassword", func(t *testing.T) {
		res, body := b.post("/console/login", url.Values{"email": {ownerEmail}, "password": {"not-the-password"}})
		// RFC 9110 section 15.5.4: 403 when the credentials given are insufficient.
		mustStatus(t, res, body, http.StatusForbidden)
		if !strings.Contains(body, "Wrong e-mail address or password.") || len(res.Cookies()) != 0 {
			t.Errorf("got cookies %v and a page without the message, want no cookie and the message", res.Cookies())
		}
	})
	t.Run("OKSignInCookie", func(t *testing.T) {
		res, body := b.post("/console/login", url.Values{"email": {ownerEmail}, "password": {consolePW}, "next": {"/console/studies/harrow-console"}})
		mustStatus(t, res, body, http.StatusSeeOther)
		if loc := res.Header.Get("Location"); loc != "/console/studies/harrow-console" {
			t.Errorf("got Location %q, want the page asked for", loc)
		}
		raw := res.Header.Get("Set-Cookie")
		// RFC 6265bis section 4.1.2: HttpOnly (4.1.2.6) keeps it from
		// scripts, SameSite=Strict (4.1.2.7) from cross-site requests; over
		// plain HTTP it cannot be Secure (4.1.2.5) and so carries no __Host-
		// prefix (4.1.3.2).
		for _, want := range []string{"trialogue-console=", "HttpOnly", "SameSite=Strict", "Path=/console"} {
			if !strings.Contains(raw, want) {
				t.Errorf("got Set-Cookie %q, want %s", raw, want)
			}
		}
		if strings.Contains(raw, "Secure") || strings.Contains(raw, "Domain") || strings.Contains(raw, "Max-Age") {
			t.Errorf("got Set-Cookie %q, want no Secure, Domain or Max-Age over plain HTTP", raw)
		}
	})
	t.Run("ErrOpenRedirect", func(t *testing.T) {
		c := newBrowserish(t, f.http.URL, nil)
		for _, next := range []string{"https://elsewhere.example/console/", "//elsewhere.example/console/", "/console/../s/x", `/console\x`} {
			res, body := c.post("/console/login", url.Values{"email": {viewerEmail}, "password": {consolePW}, "next": {next}})
			mustStatus(t, res, body, http.StatusSeeOther)
			if loc := res.Header.Get("Location"); loc != "/console/studies" {
				t.Errorf("next %q: got Location %q, want /console/studies", next, loc)
			}
		}
	})
	t.Run("OKPagesNeverFramedNorCached", func(t *testing.T) {
		res, body := b.get("/console/studies")
		mustStatus(t, res, body, http.StatusOK)
		// CSP Level 2 frame-ancestors 'none'; RFC 7034 X-Frame-Options DENY;
		// RFC 9111 section 5.2.2.5 no-store.
		if csp := res.Header.Get("Content-Security-Policy"); !strings.Contains(csp, "frame-ancestors 'none'") || strings.Contains(csp, "unsafe-inline") {
			t.Errorf("got CSP %q, want frame-ancestors 'none' and no inline script", csp)
		}
		if res.Header.Get("X-Frame-Options") != "DENY" || res.Header.Get("Cache-Control") != "no-store" {
			t.Errorf("got X-Frame-Options %q and Cache-Control %q, want DENY and no-store", res.Header.Get("X-Frame-Options"), res.Header.Get("Cache-Control"))
		}
		if strings.Contains(body, "<script>") || regexp.MustCompile(`\son[a-z]+=`).MatchString(body) {
			t.Error("a console page has inline script or an event-handler attribute")
		}
	})
	t.Run("OKRespondentPageKeepsStudyFrameAncestors", func(t *testing.T) {
		tok := f.enter("R-frame", "left")
		res := f.get("/c/"+tok, nil)
		if csp := res.Header.Get("Content-Security-Policy"); !strings.Contains(csp, "frame-ancestors https://survey.example.org") {
			t.Errorf("got CSP %q, want the study's frame-ancestors", csp)
		}
	})
	t.Run("ErrExpired", func(t *testing.T) {
		c := newBrowserish(t, f.http.URL, nil)
		c.signIn(viewerEmail)
		clock.Add(server.DefaultConsoleIdle + time.Second)
		res, _ := c.get("/console/studies")
		if res.StatusCode != http.StatusSeeOther || !strings.Contains(res.Header.Get("Location"), "expired=1") {
			t.Errorf("page: got %d to %q, want 303 to the sign-in page saying it expired", res.StatusCode, res.Header.Get("Location"))
		}
		c.signIn(viewerEmail)
		clock.Add(server.DefaultConsoleIdle + time.Second)
		res, body := c.do("GET", "/console/studies/harrow-console/monitor.json", nil, nil)
		mustStatus(t, res, body, http.StatusForbidden)
		if !strings.Contains(body, "expired") {
			t.Errorf("got %s, want JSON saying the session expired", body)
		}
	})
	t.Run("OKSignOut", func(t *testing.T) {
		c := newBrowserish(t, f.http.URL, nil)
		c.signIn(viewerEmail)
		res, body := c.post("/console/logout", url.Values{})
		mustStatus(t, res, body, http.StatusSeeOther)
		if raw := res.Header.Get("Set-Cookie"); !strings.Contains(raw, "Max-Age=0") {
			t.Errorf("got Set-Cookie %q, want the cookie removed (Max-Age=0, RFC 6265bis section 5.6.2)", raw)
		}
		res, _ = c.get("/console/studies")
		if res.StatusCode != http.StatusSeeOther {
			t.Errorf("after signing out: got %d, want 303 to the sign-in page", res.StatusCode)
		}
	})
}

// TestConsoleSlowSignIn: past five failures for an account, or twenty
// from an address, sign-ins wait, and 429 says how long (RFC 6585
// section 4, Retry-After of RFC 9110 section 10.2.3), even with the right
// password; after the wait the right password works.
func TestConsoleSlowSignIn(t *testing.T) {
	f, clock := consoleFixture(t, server.Config{})
	b := newBrowserish(t, f.http.URL, nil)
	fail := func(email string) {
		t.Helper()
		res, body := b.post("/console/login", url.Values{"email": {email}, "password": {"wrong password here"}})
		mustStatus(t, res, body, http.StatusForbidden)
	}
	for range 5 {
		fail(ownerEmail)
	}
	t.Run("ErrAccountSlowed", func(t *testing.T) {
		res, body := b.post("/console/login", url.Values{"email": {ownerEmail}, "password": {consolePW}})
		mustStatus(t, res, body, http.StatusTooManyRequests)
		if ra := res.Header.Get("Retry-After"); ra != "1" || !strings.Contains(body, "Too many failed sign-ins") {
			t.Errorf("got Retry-After %q, want 1 and the message", ra)
		}
	})
	t.Run("OKAfterTheWait", func(t *testing.T) {
		clock.Add(1500 * time.Millisecond)
		b.signIn(ownerEmail)
	})
	t.Run("ErrAddressSlowed", func(t *testing.T) {
		for i := range 15 {
			fail(fmt.Sprintf("nobody-%d@example.org", i))
		}
		res, body := b.post("/console/login", url.Values{"email": {viewerEmail}, "password": {consolePW}})
		mustStatus(t, res, body, http.StatusTooManyRequests)
		if ra := res.Header.Get("Retry-After"); ra != "1" {
			t.Errorf("got Retry-After %q, want 1", ra)
		}
		clock.Add(2 * time.Second)
		b.signIn(viewerEmail)
	})
	t.Run("OKFailuresAgeOut", func(t *testing.T) {
		clock.Add(time.Hour + time.Second)
		for range 5 {
			fail(viewerEmail)
		}
		res, body := b.post("/console/login", url.Values{"email": {viewerEmail}, "password": {consolePW}})
		mustStatus(t, res, body, http.StatusTooManyRequests)
		clock.Add(time.Hour + time.Second)
		b.signIn(viewerEmail)
	})
}

// TestConsoleSecureCookie: over TLS, or with SecureCookies behind a proxy,
// the cookie is Secure and carries the __Host- prefix (RFC 6265bis
// section 4.1.3.2: Secure, Path=/, no Domain).
func TestConsoleSecureCookie(t *testing.T) {
	check := func(t *testing.T, res *http.Response) {
		t.Helper()
		raw := res.Header.Get("Set-Cookie")
		for _, want := range []string{"__Host-trialogue-console=", "Path=/;", "Secure", "HttpOnly", "SameSite=Strict"} {
			if !strings.Contains(raw+";", want) {
				t.Errorf("got Set-Cookie %q, want %s", raw, want)
			}
		}
		if strings.Contains(raw, "Domain") {
			t.Errorf("got Set-Cookie %q, want no Domain", raw)
		}
	}
	t.Run("OKTLS", func(t *testing.T) {
		f, _ := consoleFixture(t, server.Config{})
		ts := httptest.NewTLSServer(f.srv.Handler())
		t.Cleanup(ts.Close)
		b := newBrowserish(t, ts.URL, ts.Client())
		res, body := b.post("/console/login", url.Values{"email": {ownerEmail}, "password": {consolePW}})
		mustStatus(t, res, body, http.StatusSeeOther)
		check(t, res)
		res, body = b.get("/console/studies")
		mustStatus(t, res, body, http.StatusOK)
	})
	t.Run("OKSecureCookiesBehindProxy", func(t *testing.T) {
		f, _ := consoleFixture(t, server.Config{SecureCookies: true})
		b := newBrowserish(t, f.http.URL, nil)
		res, body := b.post("/console/login", url.Values{"email": {ownerEmail}, "password": {consolePW}})
		mustStatus(t, res, body, http.StatusSeeOther)
		check(t, res)
	})
}

// TestConsoleOneTimePassword: an account with a generated password must
// replace it before anything else.
func TestConsoleOneTimePassword(t *testing.T) {
	f, _ := consoleFixture(t, server.Config{})
	if _, err := f.st.AddUser(context.Background(), "new@example.org", store.RoleOwner, "generated-once-0001", true); err != nil {
		t.Fatal(err)
	}
	b := newBrowserish(t, f.http.URL, nil)
	res, body := b.post("/console/login", url.Values{"email": {"new@example.org"}, "password": {"generated-once-0001"}})
	if res.StatusCode != http.StatusSeeOther || res.Header.Get("Location") != "/console/account" {
		t.Fatalf("got %d to %q, want 303 to /console/account; %.200s", res.StatusCode, res.Header.Get("Location"), body)
	}
	t.Run("ErrOtherPagesWait", func(t *testing.T) {
		res, _ := b.get("/console/studies")
		if res.StatusCode != http.StatusSeeOther || res.Header.Get("Location") != "/console/account" {
			t.Errorf("got %d to %q, want 303 to /console/account", res.StatusCode, res.Header.Get("Location"))
		}
		res, body := b.post("/console/studies/harrow-console/phase", url.Values{"from": {"draft"}, "to": {"pilot"}})
		mustStatus(t, res, body, http.StatusForbidden)
	})
	for _, c := range []struct {
		name, current, next, again string
		status                     int
		msg                        string
	}{
		{"ErrCurrentWrong", "nope-nope-nope", "a-new-password-of-mine", "a-new-password-of-mine", 403, "current password is not right"},
		{"ErrMismatch", "generated-once-0001", "a-new-password-of-mine", "a-new-password-of-yours", 422, "differ"},
		{"ErrShort", "generated-once-0001", "short", "short", 422, "shorter than 12"},
		{"ErrSame", "generated-once-0001", "generated-once-0001", "generated-once-0001", 422, "is the current one"},
	} {
		t.Run(c.name, func(t *testing.T) {
			res, body := b.post("/console/account", url.Values{"current": {c.current}, "new": {c.next}, "again": {c.again}})
			mustStatus(t, res, body, c.status)
			if !strings.Contains(body, c.msg) || !strings.Contains(body, "Nothing was changed") {
				t.Errorf("got a page without %q", c.msg)
			}
		})
	}
	t.Run("OKReplaced", func(t *testing.T) {
		res, body := b.post("/console/account", url.Values{"current": {"generated-once-0001"}, "new": {"a-new-password-of-mine"}, "again": {"a-new-password-of-mine"}})
		mustStatus(t, res, body, http.StatusSeeOther)
		res, body = b.get("/console/studies")
		mustStatus(t, res, body, http.StatusOK)
		if !strings.Contains(body, "harrow-console") {
			t.Error("the study list does not name the study")
		}
	})
}

// TestConsoleLifecycle: phases through the console: roles, cross-origin
// requests, the go-live checklist, closing and its grace period.
func TestConsoleLifecycle(t *testing.T) {
	f, clock := consoleFixture(t, server.Config{})
	owner := newBrowserish(t, f.http.URL, nil)
	owner.signIn(ownerEmail)
	viewer := newBrowserish(t, f.http.URL, nil)
	viewer.signIn(viewerEmail)
	const study = "/console/studies/harrow-console"
	phase := func(b *browserish, from, to string) (*http.Response, string) {
		return b.post(study+"/phase", url.Values{"from": {from}, "to": {to}, "confirm": {"yes"}})
	}
	t.Run("ErrViewerChangesNothing", func(t *testing.T) {
		res, body := phase(viewer, "draft", "pilot")
		mustStatus(t, res, body, http.StatusForbidden)
		if !strings.Contains(body, "viewer") || phaseOf(t, f) != store.PhaseDraft {
			t.Errorf("got phase %s and a page without the reason, want draft and the reason", phaseOf(t, f))
		}
	})
	t.Run("ErrCrossOrigin", func(t *testing.T) {
		for _, h := range []map[string]string{{"Origin": "https://elsewhere.example"}, {"Sec-Fetch-Site": "cross-site"}} {
			res, body := owner.do("POST", study+"/phase", url.Values{"from": {"draft"}, "to": {"pilot"}}, h)
			mustStatus(t, res, body, http.StatusForbidden)
			if !strings.Contains(body, "another site") || phaseOf(t, f) != store.PhaseDraft {
				t.Errorf("%v: got phase %s, want draft and the reason", h, phaseOf(t, f))
			}
		}
	})
	t.Run("OKSameOriginHeaders", func(t *testing.T) {
		res, body := owner.do("POST", study+"/phase", url.Values{"from": {"draft"}, "to": {"pilot"}}, map[string]string{"Origin": f.http.URL, "Sec-Fetch-Site": "same-origin"})
		mustStatus(t, res, body, http.StatusSeeOther)
		if phaseOf(t, f) != store.PhasePilot {
			t.Fatalf("got phase %s, want pilot", phaseOf(t, f))
		}
	})
	t.Run("ErrNotAPhase", func(t *testing.T) {
		res, body := phase(owner, "pilot", "paused")
		mustStatus(t, res, body, http.StatusBadRequest)
	})
	t.Run("ErrStalePage", func(t *testing.T) {
		res, body := phase(owner, "draft", "pilot")
		// RFC 9110 section 15.5.10: the request conflicts with the
		// resource's current state.
		mustStatus(t, res, body, http.StatusConflict)
	})
	t.Run("ErrGoLiveWithOpenChecklist", func(t *testing.T) {
		res, body := phase(owner, "pilot", "live")
		mustStatus(t, res, body, http.StatusConflict)
		for _, want := range []string{"Ethics approval reference entered", "At least 2 pilot transcripts", "Nothing was changed"} {
			if !strings.Contains(body, want) {
				t.Errorf("got a page without %q", want)
			}
		}
		if phaseOf(t, f) != store.PhasePilot {
			t.Errorf("got phase %s, want pilot", phaseOf(t, f))
		}
	})
	// Two pilot respondents, reviewed; the ethics reference entered.
	var ids []int64
	for _, rid := range []string{"P-1", "P-2"} {
		f.enter(rid, "left")
		sess, err := f.st.SessionByRID(context.Background(), "harrow-console", rid)
		if err != nil {
			t.Fatal(err)
		}
		ids = append(ids, sess.ID)
	}
	t.Run("ErrViewerCannotReview", func(t *testing.T) {
		res, body := viewer.post(fmt.Sprintf("%s/sessions/%d/review", study, ids[0]), url.Values{"action": {"reviewed"}})
		mustStatus(t, res, body, http.StatusForbidden)
	})
	for _, id := range ids {
		res, body := owner.post(fmt.Sprintf("%s/sessions/%d/review", study, id), url.Values{"action": {"reviewed"}})
		mustStatus(t, res, body, http.StatusSeeOther)
	}
	t.Run("ErrEmptyEthicsRef", func(t *testing.T) {
		res, body := owner.post(study+"/ethics", url.Values{"ref": {"   "}})
		mustStatus(t, res, body, http.StatusUnprocessableEntity)
	})
	res, body := owner.post(study+"/ethics", url.Values{"ref": {"Harrow Bay Research Board HB-2027-031"}})
	mustStatus(t, res, body, http.StatusSeeOther)
	t.Run("OKChecklistDone", func(t *testing.T) {
		res, body := owner.get(study)
		mustStatus(t, res, body, http.StatusOK)
		if n := strings.Count(body, `<li class="open">`); n != 0 || !strings.Contains(body, "Every item holds") {
			t.Errorf("got %d open checklist items, want none", n)
		}
	})
	t.Run("OKGoLive", func(t *testing.T) {
		res, body := phase(owner, "pilot", "live")
		mustStatus(t, res, body, http.StatusSeeOther)
		st, err := f.st.State(context.Background(), "harrow-console")
		if err != nil || st.Phase != store.PhaseLive || st.LiveVersion != f.study.Version.Version {
			t.Fatalf("got %+v, %v; want live with version %d", st, err, f.study.Version.Version)
		}
		res, body = owner.get(study)
		if !strings.Contains(body, ownerEmail) || !strings.Contains(body, "Live since") {
			t.Errorf("the study page does not show who made the change or the live state")
		}
	})
	tok := f.enter("M-1", "right")
	if a := f.call("POST", "/c/"+tok+"/resume", nil); a.Status != 200 {
		t.Fatalf("opening: got %d %s", a.Status, a.Error)
	}
	t.Run("ErrCloseWithoutConfirm", func(t *testing.T) {
		res, body := owner.post(study+"/phase", url.Values{"from": {"live"}, "to": {"closed"}})
		mustStatus(t, res, body, http.StatusUnprocessableEntity)
		if phaseOf(t, f) != store.PhaseLive {
			t.Errorf("got phase %s, want live", phaseOf(t, f))
		}
	})
	t.Run("OKClose", func(t *testing.T) {
		res, body := phase(owner, "live", "closed")
		mustStatus(t, res, body, http.StatusSeeOther)
	})
	t.Run("OKReplyWithinGrace", func(t *testing.T) {
		clock.Add(29 * time.Minute)
		if a := f.call("POST", "/c/"+tok+"/reply", reply("Is the ferry on time today?", "g1")); a.Status != 200 {
			t.Fatalf("got %d %s, want the reply taken within the grace period", a.Status, a.Error)
		}
	})
	t.Run("ErrReplyAfterGrace", func(t *testing.T) {
		clock.Add(2 * time.Minute)
		a := f.call("POST", "/c/"+tok+"/reply", reply("And tomorrow morning?", "g2"))
		// RFC 9110 section 15.5.11: 410 Gone, the conversation is no longer available.
		if a.Status != http.StatusGone || a.Rule != "study_closed" {
			t.Fatalf("got %d %q, want 410 study_closed", a.Status, a.Rule)
		}
		turns, err := f.st.Turns(context.Background(), mustSession(t, f, tok).ID)
		if err != nil || len(turns) != 3 {
			t.Errorf("got %d turns, %v; want 3: the late reply stored nothing", len(turns), err)
		}
	})
	t.Run("ErrNoPhaseAfterClosed", func(t *testing.T) {
		owner.signIn(ownerEmail) // the grace period outlasted the console session
		res, body := phase(owner, "closed", "pilot")
		mustStatus(t, res, body, http.StatusConflict)
	})
}

func mustSession(t *testing.T, f *fixture, token string) store.Session {
	t.Helper()
	s, err := f.st.SessionByToken(context.Background(), token)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

// TestConsolePilotFull: a pilot round takes its cap; the next respondent
// gets the closed page (503: the pilot may take people again later).
func TestConsolePilotFull(t *testing.T) {
	f, _ := consoleFixture(t, server.Config{})
	if err := f.st.ChangePhase(context.Background(), store.PhaseChange{Study: "harrow-console", To: store.PhasePilot}); err != nil {
		t.Fatal(err)
	}
	for i := range 4 {
		f.enter(fmt.Sprintf("F-%d", i), "left")
	}
	res, err := noRedirect.Get(f.http.URL + "/s/harrow-console?rid=F-9&lean=left")
	if err != nil {
		t.Fatal(err)
	}
	body, _ := io.ReadAll(res.Body)
	res.Body.Close()
	if res.StatusCode != http.StatusServiceUnavailable || !strings.Contains(string(body), "takes no new participants") {
		t.Fatalf("got %d %.200s, want 503 with the closed text", res.StatusCode, body)
	}
	if f.sessionCount() != 4 {
		t.Errorf("got %d sessions, want 4", f.sessionCount())
	}
}

// monitorJSON reads the monitor's JSON answer.
func monitorJSON(t *testing.T, b *browserish, query string) server.Monitor {
	t.Helper()
	res, body := b.do("GET", "/console/studies/harrow-console/monitor.json"+query, nil, nil)
	mustStatus(t, res, body, http.StatusOK)
	var m server.Monitor
	if err := json.Unmarshal([]byte(body), &m); err != nil {
		t.Fatal(err)
	}
	return m
}

// TestConsoleMonitor: the monitor counts entries, completions, sessions in
// progress and dropped ones by the study's dropout time, per arm and
// stratum; tokens and cost at the study's prices; and draws the chart.
func TestConsoleMonitor(t *testing.T) {
	f, clock := consoleFixture(t, server.Config{})
	b := newBrowserish(t, f.http.URL, nil)
	b.signIn(viewerEmail)
	t.Run("OKEmpty", func(t *testing.T) {
		m := monitorJSON(t, b, "")
		if m.Entered != 0 || m.Cohort != "pilot" || m.Dropout.Done || m.Text["entered"] != "0" || len(m.Head.Hash) != 64 {
			t.Errorf("got %+v, want an empty pilot cohort with the chain head", m)
		}
	})
	done := f.enter("D-1", "left")
	f.enter("D-2", "right")
	for i, text := range []string{"The seven o'clock ferry suits me.", "I take it most weeks."} {
		if i == 0 {
			if a := f.call("POST", "/c/"+done+"/resume", nil); a.Status != 200 {
				t.Fatal(a.Error)
			}
		}
		if a := f.call("POST", "/c/"+done+"/reply", reply(text, fmt.Sprint(i))); a.Status != 200 {
			t.Fatalf("reply: %d %s", a.Status, a.Error)
		}
	}
	if a := f.call("POST", "/c/"+done+"/finish", nil); a.Status != 200 {
		t.Fatalf("finish: %d %s", a.Status, a.Error)
	}
	// D-3's opening, with tokens as a hosted model reports them.
	tok3 := f.enter("D-3", "right")
	s3 := mustSession(t, f, tok3)
	if _, err := f.st.AddModelTurn(context.Background(), store.Turn{SessionID: s3.ID, Index: 0, Text: "Hello.", StartedAt: clock.Now(),
		LatencyMS: 100, PromptTokens: 1500, CompletionTokens: 250, StudyHash: s3.StudyHash}); err != nil {
		t.Fatal(err)
	}
	t.Run("OKCounts", func(t *testing.T) {
		m := monitorJSON(t, b, "?cohort=pilot")
		if m.Entered != 3 || m.Completed != 1 || m.InProgress != 2 || m.Dropped != 0 {
			t.Errorf("got entered %d completed %d in progress %d dropped %d, want 3 1 2 0", m.Entered, m.Completed, m.InProgress, m.Dropped)
		}
		if len(m.Arms) != 1 || m.Arms[0].Assigned != 3 || m.Arms[0].Code != "A1" {
			t.Errorf("got arms %+v, want the one arm with 3", m.Arms)
		}
		got := map[string]int{}
		for _, row := range m.Strata {
			got[row.Stratum] = row.Counts[0]
		}
		if got["lean=left"] != 1 || got["lean=right"] != 2 {
			t.Errorf("got strata %v, want lean=left 1 and lean=right 2", got)
		}
		// The scripted turns' token estimates plus 1500 input and 250
		// output tokens, at 2 and 4 EUR per 1,000.
		want := float64(m.Tokens.Input)/1000*2 + float64(m.Tokens.Output)/1000*4
		if m.Tokens.Input < 1500 || m.Tokens.Output < 250 || math.Abs(m.Tokens.Cost-want) > 1e-9 || m.Text["cost"] != strconv.FormatFloat(want, 'f', 2, 64)+" EUR" {
			t.Errorf("got tokens %+v shown as %q, want a cost of %.4f EUR", m.Tokens, m.Text["cost"], want)
		}
		if m.Latency.N != 4 {
			t.Errorf("got %d model latencies, want 4 (the opening, two answers and the hosted turn)", m.Latency.N)
		}
	})
	t.Run("OKDropped", func(t *testing.T) {
		clock.Add(11 * time.Minute)
		m := monitorJSON(t, b, "")
		if m.Dropped != 2 || m.InProgress != 0 || m.Arms[0].Dropout < 0.66 || m.Arms[0].Cells[6] != "66.7%" {
			t.Errorf("got dropped %d, in progress %d, arm %+v; want 2 dropped after 10 minutes without activity", m.Dropped, m.InProgress, m.Arms[0])
		}
		if m.Dropout.Done {
			t.Errorf("got a dropout test %+v with one arm, want none", m.Dropout)
		}
	})
	t.Run("OKMainCohortEmpty", func(t *testing.T) {
		if m := monitorJSON(t, b, "?cohort=main"); m.Entered != 0 {
			t.Errorf("got %d main entries before going live, want 0", m.Entered)
		}
	})
	t.Run("ErrCohort", func(t *testing.T) {
		res, body := b.do("GET", "/console/studies/harrow-console/monitor.json?cohort=everyone", nil, nil)
		mustStatus(t, res, body, http.StatusBadRequest)
	})
	t.Run("ErrUnknownStudy", func(t *testing.T) {
		res, body := b.do("GET", "/console/studies/no-such-study/monitor.json", nil, nil)
		mustStatus(t, res, body, http.StatusNotFound)
	})
	t.Run("OKPage", func(t *testing.T) {
		res, body := b.get("/console/studies/harrow-console/monitor")
		mustStatus(t, res, body, http.StatusOK)
		for _, want := range []string{`data-field="entered">3<`, `data-monitor`, `data-refresh-ms="5000"`, `id="entries-chart"`} {
			if !strings.Contains(body, want) {
				t.Errorf("the monitor page lacks %s", want)
			}
		}
	})
	t.Run("OKChart", func(t *testing.T) {
		res, body := b.get("/console/studies/harrow-console/entries.svg")
		mustStatus(t, res, body, http.StatusOK)
		if ct := res.Header.Get("Content-Type"); ct != "image/svg+xml" {
			t.Errorf("got Content-Type %q, want image/svg+xml", ct)
		}
		var svg struct {
			XMLName xml.Name
			Rects   []struct {
				Class string `xml:"class,attr"`
				Title string `xml:"title"`
			} `xml:"rect"`
		}
		if err := xml.Unmarshal([]byte(body), &svg); err != nil {
			t.Fatalf("the chart is not well-formed XML: %v", err)
		}
		total := 0
		for _, r := range svg.Rects {
			var n int
			fmt.Sscan(r.Title, &n)
			total += n
		}
		if svg.XMLName.Local != "svg" || total != 3 {
			t.Errorf("got <%s> with bars summing to %d, want an svg whose bars sum to 3 entries", svg.XMLName.Local, total)
		}
	})
}

// TestConsoleTranscripts: the list's filters and search, one transcript
// with its audit fields, text shown as text, and review decisions.
func TestConsoleTranscripts(t *testing.T) {
	f, _ := consoleFixture(t, server.Config{})
	owner := newBrowserish(t, f.http.URL, nil)
	owner.signIn(ownerEmail)
	const study = "/console/studies/harrow-console"
	tok := f.enter("T-1", "left")
	if a := f.call("POST", "/c/"+tok+"/resume", nil); a.Status != 200 {
		t.Fatal(a.Error)
	}
	const injected = `<script>document.title="owned"</script><img src=x onerror="alert(1)"> & more`
	// Sent with the typing measures of a pasted reply.
	typed := map[string]any{"text": injected, "client_id": "x1", "typing": map[string]int{"typing_ms": 3000, "keystrokes": 2, "pastes": 1, "hidden_count": 1}}
	if a := f.call("POST", "/c/"+tok+"/reply", typed); a.Status != 200 {
		t.Fatalf("reply: %d %s", a.Status, a.Error)
	}
	f.enter("T-2", "right")
	id := mustSession(t, f, tok).ID
	t.Run("OKList", func(t *testing.T) {
		res, body := owner.get(study + "/sessions")
		mustStatus(t, res, body, http.StatusOK)
		if !strings.Contains(body, "Sessions 1–2 of 2.") {
			t.Errorf("got a list without both sessions")
		}
	})
	t.Run("OKSearch", func(t *testing.T) {
		res, body := owner.get(study + "/sessions?q=" + url.QueryEscape("onerror"))
		mustStatus(t, res, body, http.StatusOK)
		if !strings.Contains(body, "Sessions 1–1 of 1.") || !strings.Contains(body, fmt.Sprintf(`/sessions/%d"`, id)) {
			t.Errorf("search: got a list without session %d alone", id)
		}
	})
	t.Run("OKFlagFilterAndChips", func(t *testing.T) {
		res, body := owner.get(study + "/sessions?flag=pasted")
		mustStatus(t, res, body, http.StatusOK)
		if !strings.Contains(body, "Sessions 1–1 of 1.") || !regexp.MustCompile(`<span class="chip chip-flag" title="reply 1: 1 paste[^"]*">pasted</span>`).MatchString(body) {
			t.Errorf("flag filter: got a list without session %d alone with its pasted chip", id)
		}
		res, body = owner.get(study + "/sessions?flag=refused")
		if !strings.Contains(body, "No session matches.") {
			t.Error("flag filter: a flag no session has still lists sessions")
		}
	})
	for _, c := range []struct{ name, query string }{{"ErrYesNo", "?completed=maybe"}, {"ErrArm", "?arm=nothing"}, {"ErrPage", "?page=0"}, {"ErrFlag", "?flag=rude"}} {
		t.Run(c.name, func(t *testing.T) {
			res, body := owner.get(study + "/sessions" + c.query)
			mustStatus(t, res, body, http.StatusBadRequest)
		})
	}
	t.Run("OKTextIsText", func(t *testing.T) {
		res, body := owner.get(fmt.Sprintf("%s/sessions/%d", study, id))
		mustStatus(t, res, body, http.StatusOK)
		if strings.Contains(body, injected) || strings.Contains(body, "<script>document") || strings.Contains(body, "<img src=x") {
			t.Fatal("the respondent's reply reached the page as HTML")
		}
		if !strings.Contains(body, "&lt;script&gt;document.title=&#34;owned&#34;&lt;/script&gt;&lt;img src=x onerror=&#34;alert(1)&#34;&gt; &amp; more") {
			t.Error("the reply is not on the page as escaped text")
		}
		for _, want := range []string{"Model reported", "Request SHA-256", "scripted", "turn 1", "typed in 3000 ms, 2 keystrokes, 1 paste, page hidden 1 time",
			`<li><span class="chip chip-flag">pasted</span> reply 1: 1 paste`} {
			if !strings.Contains(body, want) {
				t.Errorf("the transcript lacks %q", want)
			}
		}
	})
	t.Run("ErrSessionOfNoStudy", func(t *testing.T) {
		res, body := owner.get(study + "/sessions/999")
		mustStatus(t, res, body, http.StatusNotFound)
		res, body = owner.get(study + "/sessions/abc")
		mustStatus(t, res, body, http.StatusNotFound)
	})
	review := func(action, text string) (*http.Response, string) {
		return owner.post(fmt.Sprintf("%s/sessions/%d/review", study, id), url.Values{"action": {action}, "text": {text}})
	}
	t.Run("ErrExcludeWithoutReason", func(t *testing.T) {
		res, body := review("exclude", "")
		mustStatus(t, res, body, http.StatusUnprocessableEntity)
		if r, _ := f.st.ReviewOf(context.Background(), id); r.Excluded {
			t.Error("excluded without a reason")
		}
	})
	t.Run("OKExcludeShownAsText", func(t *testing.T) {
		res, body := review("exclude", "reply holds <b>markup</b>")
		mustStatus(t, res, body, http.StatusSeeOther)
		res, body = owner.get(fmt.Sprintf("%s/sessions/%d", study, id))
		if !strings.Contains(body, "reply holds &lt;b&gt;markup&lt;/b&gt;") {
			t.Error("the exclusion reason is not shown as text")
		}
		res, body = owner.get(study + "/sessions?excluded=yes")
		if !strings.Contains(body, "Sessions 1–1 of 1.") || !strings.Contains(body, "chip-excluded") {
			t.Error("the excluded filter does not list the session with its chip")
		}
	})
}

// TestConsoleExport: owners and viewers download the export as a zip
// archive whose CSV files parse (RFC 4180, read with encoding/csv) with a
// row per session; pilot sessions only when asked for.
func TestConsoleExport(t *testing.T) {
	f, _ := consoleFixture(t, server.Config{})
	viewer := newBrowserish(t, f.http.URL, nil)
	viewer.signIn(viewerEmail)
	for _, rid := range []string{"E-1", "E-2", "E-3"} {
		f.enter(rid, "left")
	}
	download := func(query string) (*zip.Reader, *http.Response) {
		t.Helper()
		res, body := viewer.get("/console/studies/harrow-console/export.zip" + query)
		mustStatus(t, res, body, http.StatusOK)
		zr, err := zip.NewReader(strings.NewReader(body), int64(len(body)))
		if err != nil {
			t.Fatalf("the download is not a zip archive: %v", err)
		}
		return zr, res
	}
	rows := func(zr *zip.Reader, name string) [][]string {
		t.Helper()
		for _, zf := range zr.File {
			if strings.HasSuffix(zf.Name, "/"+name) {
				rc, err := zf.Open()
				if err != nil {
					t.Fatal(err)
				}
				defer rc.Close()
				recs, err := csv.NewReader(rc).ReadAll()
				if err != nil {
					t.Fatalf("%s does not parse as CSV: %v", name, err)
				}
				return recs
			}
		}
		t.Fatalf("the archive has no %s", name)
		return nil
	}
	t.Run("OKWithPilot", func(t *testing.T) {
		zr, res := download("?pilot=1")
		// RFC 6266: a download with a file name.
		if cd := res.Header.Get("Content-Disposition"); !regexp.MustCompile(`^attachment; filename="harrow-console-export-\d{8}T\d{6}Z\.zip"$`).MatchString(cd) {
			t.Errorf("got Content-Disposition %q, want an attachment named after the study", cd)
		}
		var names []string
		for _, zf := range zr.File {
			names = append(names, zf.Name[strings.Index(zf.Name, "/")+1:])
		}
		if strings.Join(names, " ") != "sessions.csv turns.csv turns.jsonl codebook.md" {
			t.Errorf("got files %v, want sessions.csv turns.csv turns.jsonl codebook.md", names)
		}
		if got := rows(zr, "sessions.csv"); len(got) != 4 {
			t.Errorf("got %d rows in sessions.csv, want a header and 3 sessions", len(got))
		}
	})
	t.Run("OKPilotLeftOut", func(t *testing.T) {
		zr, _ := download("")
		if got := rows(zr, "sessions.csv"); len(got) != 1 {
			t.Errorf("got %d rows, want the header alone: pilot sessions are left out unless asked for", len(got))
		}
	})
	t.Run("ErrOption", func(t *testing.T) {
		res, body := viewer.get("/console/studies/harrow-console/export.zip?release=yes")
		mustStatus(t, res, body, http.StatusBadRequest)
	})
	t.Run("ErrUnknownStudy", func(t *testing.T) {
		res, body := viewer.get("/console/studies/no-such-study/export.zip")
		mustStatus(t, res, body, http.StatusNotFound)
	})
}
