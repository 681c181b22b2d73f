package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"net/url"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"trialogue/store/pgtest"
)

const demoStudy = "../../testdata/demo-study.yaml"

func TestCheck(t *testing.T) {
	t.Run("OK", func(t *testing.T) {
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"check", demoStudy}, &out, &errb); code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, errb.String())
		}
		for _, want := range []string{"is valid", "== debate (chat, code A4)", "Argue against the cable car", "lean=right", "6 or 12", "Version hash"} {
			if !strings.Contains(out.String(), want) {
				t.Fatalf("check output lacks %q:\n%s", want, out.String())
			}
		}
	})
	t.Run("ErrBrokenStudy", func(t *testing.T) {
		src, err := os.ReadFile(demoStudy)
		if err != nil {
			t.Fatal(err)
		}
		broken := strings.Replace(string(src), "replies: {min: 3, max: 5, min_words: 2, max_chars: 1500}", "replies: {min: 7, max: 5, min_words: 2, max_chars: 1500}", 1)
		broken = strings.Replace(broken, "Argue {{.vars.position}}", "Argue {{.vars.position}} to a {{.occupation}}", 1)
		path := filepath.Join(t.TempDir(), "broken.yaml")
		if err := os.WriteFile(path, []byte(broken), 0o600); err != nil {
			t.Fatal(err)
		}
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"check", path}, &out, &errb); code != exitUsage {
			t.Fatalf("got exit %d, want 2", code)
		}
		for _, want := range []*regexp.Regexp{
			regexp.MustCompile(regexp.QuoteMeta(path) + `:\d+:\d+: replies min 7 is greater than max 5`),
			regexp.MustCompile(regexp.QuoteMeta(path) + `:\d+:\d+: template refers to \.occupation, which is not a declared covariate`),
		} {
			if !want.MatchString(errb.String()) {
				t.Fatalf("stderr lacks %s:\n%s", want, errb.String())
			}
		}
		if out.Len() != 0 {
			t.Fatalf("a broken study printed a plan: %s", out.String())
		}
	})
	t.Run("ErrMissingFile", func(t *testing.T) {
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"check", "no-such-study.yaml"}, &out, &errb); code != exitUsage || !strings.Contains(errb.String(), "no-such-study.yaml") {
			t.Fatalf("got exit %d, stderr %q", code, errb.String())
		}
	})
}

// startMain runs the demo on a database in dir, as the command does.
func startMain(t *testing.T, db string) (*Main, string) {
	t.Helper()
	m := &Main{}
	var errb bytes.Buffer
	if err := m.ParseFlags([]string{"--addr", "127.0.0.1:0", "--db", db, "--study", demoStudy, "--shutdown-timeout", "5s"}, true, &errb); err != nil {
		t.Fatalf("flags: %v %s", err, errb.String())
	}
	if err := m.Run(context.Background()); err != nil {
		t.Fatalf("run: %v", err)
	}
	return m, "http://" + m.Listener.Addr().String()
}

type client struct {
	t    *testing.T
	base string
}

func (c client) do(method, path, body string, v any) int {
	c.t.Helper()
	req, err := http.NewRequest(method, c.base+path, strings.NewReader(body))
	if err != nil {
		c.t.Fatal(err)
	}
	req.Header.Set("Accept", "application/json")
	res, err := http.DefaultClient.Do(req)
	if err != nil {
		c.t.Fatal(err)
	}
	defer res.Body.Close()
	if v != nil {
		if err := json.NewDecoder(res.Body).Decode(v); err != nil {
			c.t.Fatalf("%s %s: %v", method, path, err)
		}
	}
	return res.StatusCode
}

type state struct {
	Kind        string `json:"kind"`
	Messages    []struct{ Role, Text string }
	RepliesUsed int  `json:"replies_used"`
	RepliesMin  int  `json:"replies_min"`
	CanFinish   bool `json:"can_finish"`
	Owed        bool `json:"owed"`
}

// enterChat enters respondents until one is assigned a chat arm.
func enterChat(t *testing.T, base string) (rid, token string) {
	t.Helper()
	noRedirect := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	for i := range 24 {
		rid = fmt.Sprintf("T-%d-%d", time.Now().UnixNano()%1e6, i)
		res, err := noRedirect.Get(base + "/s/quillhaven-cable-car?rid=" + rid + "&age=52&lean=centre&stance=unsure")
		if err != nil {
			t.Fatal(err)
		}
		res.Body.Close()
		token = strings.TrimPrefix(res.Header.Get("Location"), "/c/")
		var st state
		client{t, base}.do("GET", "/c/"+token+"/state", "", &st)
		if st.Kind == "chat" {
			return rid, token
		}
	}
	t.Fatal("no chat arm in 24 entries")
	return "", ""
}

// TestRestartMidConversation: a server stopped mid-chat and started again
// on the same database resumes the same session, arm and turns, and the
// completion code it gives at the end verifies with `trialogue code verify`.
func TestRestartMidConversation(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the demo's scripted delays")
	}
	restartMidConversation(t, filepath.Join(t.TempDir(), "restart.db"))
}

// TestDemoOnPostgres: the same with `trialogue demo --db postgres://...`,
// the completion code checked by `trialogue code verify` on the URL.
func TestDemoOnPostgres(t *testing.T) {
	if testing.Short() {
		t.Skip("runs the demo's scripted delays")
	}
	restartMidConversation(t, pgtest.Database(t))
}

func restartMidConversation(t *testing.T, db string) {
	m, base := startMain(t, db)
	rid, token := enterChat(t, base)
	c := client{t, base}
	var before state
	c.do("POST", "/c/"+token+"/resume", "", nil)
	c.do("POST", "/c/"+token+"/reply", `{"text":"I am not sure yet","client_id":"r1"}`, nil)
	c.do("GET", "/c/"+token+"/state", "", &before)
	sess, err := m.Store.SessionByRID(context.Background(), "quillhaven-cable-car", rid)
	if err != nil {
		t.Fatal(err)
	}
	if err := m.Close(); err != nil {
		t.Fatal(err)
	}

	m2, base2 := startMain(t, db)
	defer m2.Close()
	c = client{t, base2}
	var after state
	c.do("GET", "/c/"+token+"/state", "", &after)
	if after.RepliesUsed != before.RepliesUsed || len(after.Messages) != len(before.Messages) || after.Kind != before.Kind {
		t.Fatalf("after restart: got %+v, want %+v", after, before)
	}
	again, err := m2.Store.SessionByRID(context.Background(), "quillhaven-cable-car", rid)
	if err != nil || again.Arm != sess.Arm || again.Token != token {
		t.Fatalf("after restart the session changed: %+v (%v), was arm %s", again, err, sess.Arm)
	}
	for i := after.RepliesUsed; i < after.RepliesMin; i++ {
		c.do("POST", "/c/"+token+"/reply", fmt.Sprintf(`{"text":"Reply number %d here","client_id":"r%d"}`, i, i+2), nil)
	}
	var fin struct {
		ReturnURL string `json:"return_url"`
		Code      string `json:"code"`
	}
	if status := c.do("POST", "/c/"+token+"/finish", "", &fin); status != 200 {
		t.Fatalf("finish: got %d", status)
	}
	u, err := url.Parse(fin.ReturnURL)
	if err != nil || u.Path != "/demo/done" || u.Query().Get("code") != fin.Code {
		t.Fatalf("return URL %q", fin.ReturnURL)
	}
	m2.Close()
	t.Run("OKCodeVerifies", func(t *testing.T) {
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"code", "verify", "--db", db, "--study", "quillhaven-cable-car", rid, strings.ToLower(fin.Code)}, &out, &errb); code != exitOK {
			t.Fatalf("got exit %d: %s %s", code, out.String(), errb.String())
		}
		if !strings.HasPrefix(out.String(), "valid") {
			t.Fatalf("got %q", out.String())
		}
	})
	t.Run("ErrWrongCode", func(t *testing.T) {
		var out, errb bytes.Buffer
		wrong := "00000-00000"
		if code := run(context.Background(), []string{"code", "verify", "--db", db, "--study", "quillhaven-cable-car", rid, wrong}, &out, &errb); code != exitFail {
			t.Fatalf("got exit %d, want 1", code)
		}
	})
	t.Run("ErrUnknownStudy", func(t *testing.T) {
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"code", "verify", "--db", db, "--study", "no-such", rid, fin.Code}, &out, &errb); code != exitUsage {
			t.Fatalf("got exit %d, want 2", code)
		}
	})
}

func TestFlags(t *testing.T) {
	for _, tc := range []struct {
		name string
		args []string
		demo bool
		want string
	}{
		{"ErrNoStudy", nil, false, "no study"},
		{"ErrLogFormat", []string{"--study", demoStudy, "--log-format", "xml"}, false, "log-format"},
		{"ErrStrayArgument", []string{"--study", demoStudy, "extra"}, false, "unexpected argument"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			var errb bytes.Buffer
			err := (&Main{}).ParseFlags(tc.args, tc.demo, &errb)
			if err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("got %v, want an error about %q", err, tc.want)
			}
		})
	}
	t.Run("OKDemoDefaults", func(t *testing.T) {
		m := &Main{}
		var errb bytes.Buffer
		if err := m.ParseFlags(nil, true, &errb); err != nil {
			t.Fatal(err)
		}
		if m.Config.DB != "trialogue-demo.db" || len(m.Config.Studies) != 1 || m.Config.Synchronous != "" { // "": the store's default, FULL on SQLite
			t.Fatalf("got %+v", m.Config)
		}
	})
	t.Run("ErrUnknownCommand", func(t *testing.T) {
		var out, errb bytes.Buffer
		if code := run(context.Background(), []string{"frobnicate"}, &out, &errb); code != exitUsage || !strings.Contains(errb.String(), "unknown command") {
			t.Fatalf("got %d %q", code, errb.String())
		}
	})
}
