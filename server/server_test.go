package server_test

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"net/url"
	"path/filepath"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/server"
	"trialogue/store"
	"trialogue/web"
)

// studyYAML builds a one-arm study around the given arm and endpoint.
func studyYAML(id, endpoint, arm string) string {
	return `id: ` + id + `
title: Harrow Bay ferry timetable
covariates:
  - {name: lean, type: choice, values: [left, right], required: true}
  - {name: age, type: integer, min: 18, max: 99}
strata: [lean]
allocation: {blocks: [2], arms: {only: 1}}
endpoints:
  ` + endpoint + `
arms:
  only:
` + arm + `
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}&arm={{.arm_code}}"
`
}

const scriptedEndpoint = `bot: {kind: scripted, chunks: 4}`

const chatArm = `    kind: chat
    endpoint: bot
    opening: true
    prompt: Say hello to a resident of Harrow Bay.
    replies: {min: 2, max: 3, min_words: 2, max_chars: 200}
    system: You talk about the Harrow Bay ferry timetable with a {{.lean}} resident.
    script: ["Hello from the ferry desk.", "The morning ferry leaves at seven.", "The evening ferry leaves at six.", "Thanks for talking."]`

type fixture struct {
	t     testing.TB
	srv   *server.Server
	st    *store.Store
	http  *httptest.Server
	study *server.Study
}

func newFixture(t testing.TB, yaml string, env map[string]string) *fixture {
	t.Helper()
	return buildFixture(t, yaml, server.Config{MaxBody: 4096, Getenv: func(k string) string { return env[k] }}, nil)
}

// buildFixture serves one study over loopback with the configuration
// given (its log discarded), on a database in the test's folder; a non-nil
// now replaces the server's clock.
func buildFixture(t testing.TB, yaml string, cfg server.Config, now func() time.Time) *fixture {
	t.Helper()
	ctx := context.Background()
	def, err := arms.Parse("test.yaml", []byte(yaml))
	if err != nil {
		t.Fatalf("parse study: %v", err)
	}
	st, err := store.Open(ctx, filepath.Join(t.TempDir(), "t.db"), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { st.Close() })
	assets, err := web.Load()
	if err != nil {
		t.Fatal(err)
	}
	cfg.Logger = slog.New(slog.DiscardHandler)
	srv := server.New(st, assets, cfg)
	if now != nil {
		srv.Now = now
	}
	study, err := srv.AddStudy(ctx, def, []byte(yaml))
	if err != nil {
		t.Fatalf("add study: %v", err)
	}
	hs := httptest.NewServer(srv.Handler())
	t.Cleanup(hs.Close)
	return &fixture{t: t, srv: srv, st: st, http: hs, study: study}
}

var noRedirect = &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}

// enter follows an entry link and returns the session's token.
func (f *fixture) enter(rid, lean string) string {
	f.t.Helper()
	res, err := noRedirect.Get(f.http.URL + "/s/" + f.study.Def.ID + "?rid=" + rid + "&lean=" + lean)
	if err != nil {
		f.t.Fatal(err)
	}
	res.Body.Close()
	if res.StatusCode != http.StatusSeeOther {
		f.t.Fatalf("entry: got status %d, want 303", res.StatusCode)
	}
	loc := res.Header.Get("Location")
	token, ok := strings.CutPrefix(loc, "/c/")
	if !ok {
		f.t.Fatalf("entry: got Location %q, want /c/TOKEN", loc)
	}
	return token
}

type answer struct {
	Status    int
	Reply     string       `json:"reply"`
	State     server.State `json:"state"`
	Error     string       `json:"error"`
	Rule      string       `json:"rule"`
	Field     string       `json:"field"`
	ReturnURL string       `json:"return_url"`
	Code      string       `json:"code"`
}

func (f *fixture) call(method, path string, body any) answer {
	f.t.Helper()
	var r io.Reader
	switch b := body.(type) {
	case nil:
	case []byte:
		r = bytes.NewReader(b)
	default:
		j, err := json.Marshal(b)
		if err != nil {
			f.t.Fatal(err)
		}
		r = bytes.NewReader(j)
	}
	req, err := http.NewRequest(method, f.http.URL+path, r)
	if err != nil {
		f.t.Fatal(err)
	}
	req.Header.Set("Accept", "application/json")
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		f.t.Fatal(err)
	}
	defer res.Body.Close()
	a := answer{Status: res.StatusCode}
	raw, _ := io.ReadAll(res.Body)
	if path != "" && strings.HasSuffix(path, "/state") {
		if err := json.Unmarshal(raw, &a.State); err != nil {
			f.t.Fatalf("state: %v in %s", err, raw)
		}
		return a
	}
	if err := json.Unmarshal(raw, &a); err != nil {
		f.t.Fatalf("%s %s: %v in %q", method, path, err, raw)
	}
	return a
}

func reply(text, id string) map[string]string {
	return map[string]string{"text": text, "client_id": id}
}

func TestChatPath(t *testing.T) {
	f := newFixture(t, studyYAML("harrow-chat", scriptedEndpoint, chatArm), nil)
	tok := f.enter("R-1001", "left")
	c := "/c/" + tok

	st := f.call("GET", c+"/state", nil).State
	if st.Kind != "chat" || !st.Owed || st.CanReply || len(st.Messages) != 0 {
		t.Fatalf("fresh state: got %+v, want an owed opening", st)
	}
	open := f.call("POST", c+"/resume", nil)
	if open.Status != 200 || open.Reply != "Hello from the ferry desk." {
		t.Fatalf("opening: got %d %q", open.Status, open.Reply)
	}
	t.Run("ErrTooShort", func(t *testing.T) {
		a := f.call("POST", c+"/reply", reply("hmm", "x1"))
		if a.Status != 422 || a.Rule != "too_short" {
			t.Fatalf("got %d %q, want 422 too_short", a.Status, a.Rule)
		}
	})
	t.Run("ErrFinishBeforeMinimum", func(t *testing.T) {
		a := f.call("POST", c+"/finish", nil)
		if a.Status != 409 || a.Rule != "min_not_met" {
			t.Fatalf("got %d %q, want 409 min_not_met", a.Status, a.Rule)
		}
	})
	a := f.call("POST", c+"/reply", reply("When is the first ferry?", "id-1"))
	if a.Status != 200 || a.Reply != "The morning ferry leaves at seven." || a.State.RepliesUsed != 1 {
		t.Fatalf("reply 1: got %d %q used %d", a.Status, a.Reply, a.State.RepliesUsed)
	}
	t.Run("OKSameClientIDSameAnswer", func(t *testing.T) {
		again := f.call("POST", c+"/reply", reply("When is the first ferry?", "id-1"))
		if again.Status != 200 || again.Reply != a.Reply || again.State.RepliesUsed != 1 || len(again.State.Messages) != 3 {
			t.Fatalf("resend: got %d %q used %d messages %d", again.Status, again.Reply, again.State.RepliesUsed, len(again.State.Messages))
		}
	})
	a = f.call("POST", c+"/reply", reply("And the last one?", "id-2"))
	if !a.State.CanFinish || a.State.RepliesUsed != 2 {
		t.Fatalf("after the minimum: got %+v, want can_finish", a.State)
	}
	a = f.call("POST", c+"/reply", reply("Thanks, that helps me.", "id-3"))
	if a.State.CanReply {
		t.Fatalf("after the maximum: can_reply still true")
	}
	t.Run("ErrAfterMaximum", func(t *testing.T) {
		a := f.call("POST", c+"/reply", reply("One more question please", "id-4"))
		if a.Status != 409 || a.Rule != "max_reached" {
			t.Fatalf("got %d %q, want 409 max_reached", a.Status, a.Rule)
		}
	})
	fin := f.call("POST", c+"/finish", nil)
	if fin.Status != 200 {
		t.Fatalf("finish: got %d %s", fin.Status, fin.Error)
	}
	u, err := url.Parse(fin.ReturnURL)
	if err != nil || u.Host != "survey.example.org" || u.Query().Get("rid") != "R-1001" || u.Query().Get("arm") != "A1" {
		t.Fatalf("return URL: got %q", fin.ReturnURL)
	}
	if !codes.VerifyCompletion(f.study.Version.Secret, "harrow-chat", "R-1001", u.Query().Get("code")) {
		t.Fatalf("completion code %q does not verify", u.Query().Get("code"))
	}
	if again := f.call("POST", c+"/finish", nil); again.ReturnURL != fin.ReturnURL {
		t.Fatalf("finish twice: got %q, want %q", again.ReturnURL, fin.ReturnURL)
	}
	t.Run("ErrReplyAfterFinish", func(t *testing.T) {
		if a := f.call("POST", c+"/reply", reply("Still there?", "id-5")); a.Status != 409 {
			t.Fatalf("got %d, want 409", a.Status)
		}
	})
	t.Run("OKStoredLog", func(t *testing.T) {
		sess, err := f.st.SessionByToken(context.Background(), tok)
		if err != nil {
			t.Fatal(err)
		}
		turns, err := f.st.Turns(context.Background(), sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		if len(turns) != 7 {
			t.Fatalf("got %d turns, want 7 (opening + 3 replies + 3 answers)", len(turns))
		}
		for _, tn := range turns {
			if tn.TextSHA256 != codes.SHA256Hex([]byte(tn.Text)) || tn.StudyHash != f.study.Version.Hash {
				t.Fatalf("turn %d: hashes do not match its text and study", tn.Index)
			}
			if tn.Role == store.RoleAssistant && (tn.SystemSHA256 == "" || tn.RequestSHA256 == "" || tn.ModelReported == "") {
				t.Fatalf("model turn %d lacks audit fields: %+v", tn.Index, tn)
			}
		}
	})
	t.Run("OKSameRIDSameSession", func(t *testing.T) {
		if again := f.enter("R-1001", "left"); again != tok {
			t.Fatalf("re-entry gave another session")
		}
	})
}

// readEvents parses a Server-Sent Events stream (WHATWG HTML, "server-sent
// events": event and data lines, blank line between events).
func readEvents(t *testing.T, r io.Reader) (names []string, data []json.RawMessage) {
	t.Helper()
	sc := bufio.NewScanner(r)
	var name, d string
	for sc.Scan() {
		line := sc.Text()
		switch {
		case strings.HasPrefix(line, "event: "):
			name = strings.TrimPrefix(line, "event: ")
		case strings.HasPrefix(line, "data: "):
			d += strings.TrimPrefix(line, "data: ")
		case line == "":
			names = append(names, name)
			data = append(data, json.RawMessage(d))
			name, d = "", ""
		}
	}
	return names, data
}

func TestReplyStream(t *testing.T) {
	f := newFixture(t, studyYAML("harrow-sse", scriptedEndpoint, chatArm), nil)
	c := "/c/" + f.enter("R-2", "right")
	f.call("POST", c+"/resume", nil)
	req, _ := http.NewRequest("POST", f.http.URL+c+"/reply", strings.NewReader(`{"text":"When is the first ferry?","client_id":"s1"}`))
	req.Header.Set("Accept", "text/event-stream")
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	if ct := res.Header.Get("Content-Type"); !strings.HasPrefix(ct, "text/event-stream") {
		t.Fatalf("got Content-Type %q, want text/event-stream", ct)
	}
	names, data := readEvents(t, res.Body)
	if len(names) < 3 || names[0] != "saved" || names[len(names)-1] != "done" {
		t.Fatalf("got events %v, want saved, chunk..., done", names)
	}
	var text strings.Builder
	chunks := 0
	for i, n := range names {
		if n == "chunk" {
			var c struct{ Text string }
			json.Unmarshal(data[i], &c)
			text.WriteString(c.Text)
			chunks++
		}
	}
	var done struct {
		Reply    string
		State    server.State
		ServerMS *float64 `json:"server_ms"`
	}
	if err := json.Unmarshal(data[len(data)-1], &done); err != nil {
		t.Fatal(err)
	}
	if chunks < 2 || text.String() != done.Reply || done.Reply != "The morning ferry leaves at seven." {
		t.Fatalf("got %d chunks %q and reply %q", chunks, text.String(), done.Reply)
	}
	if done.State.RepliesUsed != 1 || len(done.State.Messages) != 3 {
		t.Fatalf("final state: %+v", done.State)
	}
	if done.ServerMS == nil || *done.ServerMS < 0 {
		t.Fatalf("done event: got server_ms %v, want the server's own time per turn", done.ServerMS)
	}
}

func TestBadInput(t *testing.T) {
	f := newFixture(t, studyYAML("harrow-bad", scriptedEndpoint, chatArm), nil)
	c := "/c/" + f.enter("R-3", "left")
	f.call("POST", c+"/resume", nil)
	get := func(path string) (int, string) {
		res, err := noRedirect.Get(f.http.URL + path)
		if err != nil {
			t.Fatal(err)
		}
		defer res.Body.Close()
		b, _ := io.ReadAll(res.Body)
		return res.StatusCode, string(b)
	}
	for _, tc := range []struct {
		name, path string
		status     int
		mention    string
	}{
		{"ErrUnknownStudy", "/s/no-such-study?rid=a&lean=left", 404, "not valid"},
		{"ErrMissingRID", "/s/harrow-bad?lean=left", 400, "rid"},
		{"ErrMalformedRID", "/s/harrow-bad?rid=a%20b&lean=left", 400, "rid"},
		{"ErrCovariateOutsideValues", "/s/harrow-bad?rid=a&lean=centre", 400, "lean"},
		{"ErrMissingRequiredCovariate", "/s/harrow-bad?rid=a", 400, "lean"},
		{"ErrIntegerOutOfRange", "/s/harrow-bad?rid=a&lean=left&age=7", 400, "age"},
		{"ErrUnknownToken", "/c/AAAAAAAAAAAAAAAAAAAAAAAAAAAAAAAA", 404, "not valid"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			status, body := get(tc.path)
			if status != tc.status || !strings.Contains(body, tc.mention) {
				t.Fatalf("got %d, want %d naming %q; body: %.300s", status, tc.status, tc.mention, body)
			}
			if strings.Contains(body, "goroutine") || strings.Contains(body, ".go:") {
				t.Fatalf("error page leaks internals: %.300s", body)
			}
		})
	}
	for _, tc := range []struct {
		name   string
		body   []byte
		status int
	}{
		{"ErrBodyTooLarge", []byte(`{"text":"` + strings.Repeat("word ", 2000) + `","client_id":"b1"}`), 413},
		{"ErrInvalidUTF8", []byte("{\"text\":\"caf\xe9 au lait\",\"client_id\":\"b2\"}"), 400},
		{"ErrNotJSON", []byte(`text=hello`), 400},
		{"ErrUnknownField", []byte(`{"text":"hello there","client":"b3"}`), 400},
		{"ErrBadClientID", []byte(`{"text":"hello there","client_id":"<b4>"}`), 400},
		{"ErrTooLong", []byte(`{"text":"` + strings.Repeat("a ", 150) + `","client_id":"b5"}`), 422},
	} {
		t.Run(tc.name, func(t *testing.T) {
			a := f.call("POST", c+"/reply", tc.body)
			if a.Status != tc.status {
				t.Fatalf("got %d (%s), want %d", a.Status, a.Error, tc.status)
			}
		})
	}
	if st := f.call("GET", c+"/state", nil).State; st.RepliesUsed != 0 || len(st.Messages) != 1 {
		t.Fatalf("bad input changed the session: %+v", st)
	}
}

func TestFixedArm(t *testing.T) {
	arm := `    kind: fixed
    min_seconds: 20
    text: "The Harrow Bay ferry will run every hour from May."`
	f := newFixture(t, studyYAML("harrow-fixed", scriptedEndpoint, arm), nil)
	c := "/c/" + f.enter("R-4", "left")
	st := f.call("GET", c+"/state", nil).State
	if st.Kind != "fixed" || st.CanFinish || st.WaitSeconds < 19 {
		t.Fatalf("fresh fixed arm: %+v", st)
	}
	if a := f.call("POST", c+"/finish", nil); a.Status != 409 || a.Rule != "too_early" {
		t.Fatalf("early finish: got %d %q, want 409 too_early", a.Status, a.Rule)
	}
	if a := f.call("POST", c+"/reply", reply("Can I reply here?", "f1")); a.Status != 409 || a.Rule != "not_chat" {
		t.Fatalf("reply to a fixed arm: got %d %q, want 409 not_chat", a.Status, a.Rule)
	}
	f.srv.Now = func() time.Time { return time.Now().Add(21 * time.Second) }
	if a := f.call("POST", c+"/finish", nil); a.Status != 200 || a.ReturnURL == "" {
		t.Fatalf("finish after reading time: got %d %q", a.Status, a.Error)
	}
}

func TestMessageArm(t *testing.T) {
	arm := `    kind: message
    endpoint: bot
    system: You write to a {{.lean}} resident of Harrow Bay.
    prompt: Write one short note about the new ferry timetable.
    script: ["The ferry now runs every hour. Plan your crossing at the harbour office."]`
	f := newFixture(t, studyYAML("harrow-message", scriptedEndpoint, arm), nil)
	c := "/c/" + f.enter("R-5", "left")
	if st := f.call("GET", c+"/state", nil).State; !st.Owed || st.CanFinish {
		t.Fatalf("fresh message arm: %+v", st)
	}
	first := f.call("POST", c+"/resume", nil)
	second := f.call("POST", c+"/resume", nil)
	if first.Reply == "" || second.State.Messages[0].Text != first.Reply || len(second.State.Messages) != 1 {
		t.Fatalf("message shown again changed or doubled: %q then %+v", first.Reply, second.State.Messages)
	}
	if !second.State.CanFinish {
		t.Fatalf("message arm without reading time should allow continuing: %+v", second.State)
	}
}

// fakeModel is a local OpenAI-compatible endpoint: it fails while down is
// set and otherwise streams a reply in the chat-completions streaming
// format (the "data:" lines and "[DONE]" that go-openai parses).
type fakeModel struct {
	down     atomic.Bool
	calls    atomic.Int32
	lastBody atomic.Value
}

func (m *fakeModel) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	m.calls.Add(1)
	b, _ := io.ReadAll(r.Body)
	m.lastBody.Store(string(b))
	if m.down.Load() {
		http.Error(w, `{"error":{"message":"overloaded","type":"server_error"}}`, http.StatusServiceUnavailable)
		return
	}
	w.Header().Set("Content-Type", "text/event-stream")
	for _, part := range []string{"Ferries ", "run ", "hourly."} {
		fmt.Fprintf(w, "data: {\"id\":\"x\",\"object\":\"chat.completion.chunk\",\"model\":\"harbour-model-2027-02\",\"system_fingerprint\":\"fp_hb1\",\"choices\":[{\"index\":0,\"delta\":{\"content\":%q}}]}\n\n", part)
	}
	fmt.Fprint(w, "data: {\"id\":\"x\",\"object\":\"chat.completion.chunk\",\"model\":\"harbour-model-2027-02\",\"system_fingerprint\":\"fp_hb1\",\"choices\":[{\"index\":0,\"delta\":{},\"finish_reason\":\"stop\"}]}\n\n")
	fmt.Fprint(w, "data: [DONE]\n\n")
}

func TestModelDown(t *testing.T) {
	model := &fakeModel{}
	ms := httptest.NewServer(model)
	t.Cleanup(ms.Close)
	endpoint := `hosted: {kind: openai, base_url: "` + ms.URL + `/v1", model: harbour-model, api_key_env: HARBOUR_KEY, attempts: 1, timeout: 5s, temperature: 0.3}`
	arm := `    kind: chat
    endpoint: hosted
    replies: {min: 1, max: 2}
    system: You discuss the Harrow Bay ferry with a {{.lean}} resident.`
	f := newFixture(t, studyYAML("harrow-down", endpoint, arm), map[string]string{"HARBOUR_KEY": "sk-test-not-a-real-key"})
	c := "/c/" + f.enter("R-6", "left")
	other := "/c/" + f.enter("R-7", "right")
	f.call("POST", other+"/reply", reply("A different respondent writes this secret sentence.", "o1"))

	model.down.Store(true)
	a := f.call("POST", c+"/reply", reply("Please tell me the timetable.", "d1"))
	if a.Status != http.StatusServiceUnavailable || !a.State.Failed || !a.State.Owed {
		t.Fatalf("model down: got %d failed=%v owed=%v, want 503 with the retry path", a.Status, a.State.Failed, a.State.Owed)
	}
	if len(a.State.Messages) != 1 || a.State.Messages[0].Text != "Please tell me the timetable." {
		t.Fatalf("the reply was not kept while the model was down: %+v", a.State.Messages)
	}
	model.down.Store(false)
	r := f.call("POST", c+"/resume", nil)
	if r.Status != 200 || r.Reply != "Ferries run hourly." || r.State.Failed || len(r.State.Messages) != 2 {
		t.Fatalf("retry: got %d %q %+v", r.Status, r.Reply, r.State)
	}
	body, _ := model.lastBody.Load().(string)
	if strings.Contains(body, "secret sentence") || !strings.Contains(body, "Please tell me the timetable.") || !strings.Contains(body, "left resident") {
		t.Fatalf("model request holds other sessions' text or lacks this one's: %s", body)
	}
	sess, _ := f.st.SessionByToken(context.Background(), strings.TrimPrefix(c, "/c/"))
	turns, _ := f.st.Turns(context.Background(), sess.ID)
	if len(turns) != 2 || turns[1].ModelRequested != "harbour-model" || turns[1].ModelReported != "harbour-model-2027-02" || turns[1].Fingerprint != "fp_hb1" {
		t.Fatalf("stored turns: %+v", turns)
	}
	if turns[1].RequestSHA256 != codes.SHA256Hex([]byte(body)) {
		t.Fatalf("request hash %s is not the SHA-256 of the body the endpoint received", turns[1].RequestSHA256)
	}
}

func TestMissingAPIKey(t *testing.T) {
	def, err := arms.Parse("t.yaml", []byte(studyYAML("harrow-key", `hosted: {kind: openai, base_url: "http://127.0.0.1:1/v1", model: m, api_key_env: HARBOUR_KEY}`,
		"    kind: chat\n    endpoint: hosted\n    replies: {min: 1, max: 2}\n    system: Hello.")))
	if err != nil {
		t.Fatal(err)
	}
	_, err = server.Responders(def, func(string) string { return "" })
	if err == nil || !strings.Contains(err.Error(), "HARBOUR_KEY") {
		t.Fatalf("got %v, want an error naming HARBOUR_KEY", err)
	}
}

// benchServer serves a one-arm chat study with the scripted responder at
// zero delay, allowing six replies per session like a typical chat arm.
func benchServer(b *testing.B) *httptest.Server {
	b.Helper()
	arm := strings.Replace(chatArm, "replies: {min: 2, max: 3, min_words: 2, max_chars: 200}", "replies: {min: 1, max: 6}", 1)
	arm = strings.Replace(arm, "    opening: true\n", "", 1)
	return newFixture(b, studyYAML("harrow-bench", `bot: {kind: scripted}`, arm), nil).http
}

// benchRespondent sends replies through one session after another.
type benchRespondent struct {
	url, token, name string
	n                int
}

func (r *benchRespondent) reply(b *testing.B) {
	if r.n%6 == 0 {
		res, err := noRedirect.Get(fmt.Sprintf("%s/s/harrow-bench?rid=%s-%d&lean=left", r.url, r.name, r.n))
		if err != nil {
			b.Fatal(err)
		}
		res.Body.Close()
		r.token = strings.TrimPrefix(res.Header.Get("Location"), "/c/")
	}
	res, err := http.Post(r.url+"/c/"+r.token+"/reply", "application/json",
		strings.NewReader(fmt.Sprintf(`{"text":"reply number %d","client_id":"c%d"}`, r.n, r.n)))
	if err != nil {
		b.Fatal(err)
	}
	io.Copy(io.Discard, res.Body)
	res.Body.Close()
	if res.StatusCode != 200 {
		b.Fatalf("reply %d: status %d", r.n, res.StatusCode)
	}
	r.n++
}

// BenchmarkDurableTurn measures one reply through the HTTP API, one
// respondent at a time: the respondent's turn and the model's turn are each
// committed (synchronous=FULL) before the answer is sent, so an operation is
// two durable turns.
func BenchmarkDurableTurn(b *testing.B) {
	hs := benchServer(b)
	r := &benchRespondent{url: hs.URL, name: "serial"}
	for b.Loop() {
		r.reply(b)
	}
	b.ReportMetric(2*float64(b.N)/b.Elapsed().Seconds(), "turns/s")
}

// BenchmarkDurableTurnParallel is the same with 32 respondents per core
// replying at once, whose commits are shared.
func BenchmarkDurableTurnParallel(b *testing.B) {
	hs := benchServer(b)
	var id atomic.Int64
	b.SetParallelism(32)
	b.RunParallel(func(pb *testing.PB) {
		r := &benchRespondent{url: hs.URL, name: fmt.Sprintf("p%d", id.Add(1))}
		for pb.Next() {
			r.reply(b)
		}
	})
	b.ReportMetric(2*float64(b.N)/b.Elapsed().Seconds(), "turns/s")
}

func TestClosedStudy(t *testing.T) {
	f := newFixture(t, studyYAML("harrow-closed", scriptedEndpoint, chatArm), nil)
	tok := f.enter("R-before", "left")
	if err := f.st.CloseStudy(context.Background(), "harrow-closed"); err != nil {
		t.Fatal(err)
	}
	t.Run("ErrNewRespondent", func(t *testing.T) {
		res, err := noRedirect.Get(f.http.URL + "/s/harrow-closed?rid=R-after&lean=left")
		if err != nil {
			t.Fatal(err)
		}
		body, _ := io.ReadAll(res.Body)
		res.Body.Close()
		if res.StatusCode != http.StatusGone || !strings.Contains(string(body), "closed") {
			t.Fatalf("got %d %.200s, want 410 saying the study is closed", res.StatusCode, body)
		}
	})
	t.Run("OKReturningRespondent", func(t *testing.T) {
		if again := f.enter("R-before", "left"); again != tok {
			t.Fatal("a returning respondent got another session")
		}
	})
}
