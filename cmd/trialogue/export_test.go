package main

import (
	"bytes"
	"context"
	"database/sql"
	"encoding/csv"
	"errors"
	"fmt"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/cdproto/cdp"
	"github.com/chromedp/cdproto/page"
	"github.com/chromedp/chromedp"
	"github.com/chromedp/chromedp/kb"
)

// exportStudy is a fictional one-arm chat study with an offline responder
// that answers at once.
const exportStudy = `# A fictional town and ferry, for the export tests.
id: fernhill-ferry
title: Fernhill ferry landing
language: en
covariates:
  - {name: lean, type: choice, values: [left, right], required: true}
  - {name: street, type: text, max_len: 80}
strata: [lean]
allocation: {blocks: [1], arms: {talk: 1}}
endpoints:
  bot: {kind: scripted}
arms:
  talk:
    kind: chat
    endpoint: bot
    replies: {min: 2, max: 3, min_words: 2, max_chars: 600}
    system: You talk with a resident of Fernhill about moving the ferry landing.
    script: ["The landing would move two streets north.", "It would open next spring.", "Thanks for talking."]
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}"
`

// startExportServer serves exportStudy on a database in a temporary folder.
func startExportServer(t *testing.T) (*Main, client) {
	t.Helper()
	dir := t.TempDir()
	path := filepath.Join(dir, "fernhill.yaml")
	if err := os.WriteFile(path, []byte(exportStudy), 0o600); err != nil {
		t.Fatal(err)
	}
	m := &Main{}
	m.Config = Config{Addr: "127.0.0.1:0", DB: filepath.Join(dir, "t.db"), Studies: []string{path},
		Synchronous: "FULL", LogFormat: "text", ShutdownTimeout: 5 * time.Second}
	if err := m.Run(context.Background()); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { closeMain(t, m) })
	return m, client{t, "http://" + m.Listener.Addr().String()}
}

// enterAs follows the entry link for rid and returns the session's token.
func (c client) enterAs(rid, query string) string {
	c.t.Helper()
	noRedirect := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	res, err := noRedirect.Get(c.base + "/s/fernhill-ferry?rid=" + rid + "&" + query)
	if err != nil {
		c.t.Fatal(err)
	}
	res.Body.Close()
	if res.StatusCode != http.StatusSeeOther {
		c.t.Fatalf("enter %s: got status %d, want 303", rid, res.StatusCode)
	}
	return strings.TrimPrefix(res.Header.Get("Location"), "/c/")
}

// readExportCSV reads an export file with encoding/csv (RFC 4180), every
// record as wide as the header.
func readExportCSV(t *testing.T, path string) []map[string]string {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatalf("read %s: %v", path, err)
	}
	var out []map[string]string
	for _, r := range recs[1:] {
		row := map[string]string{}
		for i, v := range r {
			row[recs[0][i]] = v
		}
		out = append(out, row)
	}
	return out
}

// TestExportCommand drives respondents through the JSON API, with and
// without typing measures and with bad ones, and exports the study with
// the command.
func TestExportCommand(t *testing.T) {
	m, c := startExportServer(t)
	ctx := context.Background()
	one := c.enterAs("FERN-1", "lean=left&street=12%20Quay%20Row")
	two := c.enterAs("FERN-2", "lean=right")
	three := c.enterAs("FERN-3", "lean=left")

	// FERN-1 types one reply and pastes the other, then finishes.
	for i, body := range []string{
		`{"text":"I cross on the ferry every morning.","client_id":"a1","typing":{"typing_ms":9000,"keystrokes":40,"pastes":0,"hidden_count":0}}`,
		`{"text":"Moving the landing north would add ten minutes to my walk.","client_id":"a2","typing":{"typing_ms":1200,"keystrokes":0,"pastes":1,"hidden_count":2}}`,
	} {
		if status := c.do("POST", "/c/"+one+"/reply", body, nil); status != http.StatusOK {
			t.Fatalf("reply %d of FERN-1: got status %d, want 200", i+1, status)
		}
	}
	if status := c.do("POST", "/c/"+one+"/finish", "", nil); status != http.StatusOK {
		t.Fatalf("finish: got status %d, want 200", status)
	}

	t.Run("ErrBadTypingMeasures", func(t *testing.T) {
		for _, tc := range []struct{ name, typing, field string }{
			{"Negative", `{"typing_ms":-5}`, "typing.typing_ms"},
			{"OverBound", `{"pastes":20000}`, "typing.pastes"},
			{"NotANumber", `{"keystrokes":"many"}`, "typing.keystrokes"},
			{"NotWhole", `{"hidden_count":1.5}`, "typing.hidden_count"},
		} {
			t.Run(tc.name, func(t *testing.T) {
				var answer struct{ Error, Field string }
				status := c.do("POST", "/c/"+two+"/reply", `{"text":"A reply with bad measures","client_id":"b1","typing":`+tc.typing+`}`, &answer)
				if status != http.StatusBadRequest || answer.Field != tc.field {
					t.Fatalf("got status %d, field %q (%s), want 400 naming %s", status, answer.Field, answer.Error, tc.field)
				}
			})
		}
		t.Run("UnknownMeasure", func(t *testing.T) {
			var answer struct{ Error string }
			status := c.do("POST", "/c/"+two+"/reply", `{"text":"A reply with bad measures","client_id":"b1","typing":{"speed":3}}`, &answer)
			if status != http.StatusBadRequest || !strings.Contains(answer.Error, "speed") {
				t.Fatalf("got status %d (%s), want 400 naming speed", status, answer.Error)
			}
		})
		var st state
		c.do("GET", "/c/"+two+"/state", "", &st)
		if st.RepliesUsed != 0 || len(st.Messages) != 0 {
			t.Fatalf("refused replies changed the session: %d replies, %d messages", st.RepliesUsed, len(st.Messages))
		}
	})
	// Without measures, as older pages and API clients send it.
	if status := c.do("POST", "/c/"+two+"/reply", `{"text":"I would rather keep the landing where it is.","client_id":"b2"}`, nil); status != http.StatusOK {
		t.Fatalf("reply without measures: got status %d, want 200", status)
	}
	if status := c.do("POST", "/c/"+three+"/reply", `{"text":"A pilot reply from the study team.","client_id":"c1"}`, nil); status != http.StatusOK {
		t.Fatalf("reply of FERN-3: got status %d, want 200", status)
	}
	// FERN-3 is a pilot session, the others are not, whatever the phase
	// they entered in: the export's choice is what is tested here.
	db, err := sql.Open("sqlite", "file:"+m.Config.DB+"?_pragma=busy_timeout(10000)")
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if _, err := db.Exec(`UPDATE sessions SET pilot = (rid = 'FERN-3')`); err != nil {
		t.Fatal(err)
	}

	exportTo := func(t *testing.T, extra ...string) (string, string) {
		t.Helper()
		out := filepath.Join(t.TempDir(), "export")
		var stdout, stderr bytes.Buffer
		args := append([]string{"export", "--db", m.Config.DB, "--study", "fernhill-ferry", "--out", out}, extra...)
		if code := run(ctx, args, &stdout, &stderr); code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, stderr.String())
		}
		return out, stdout.String()
	}

	t.Run("OK", func(t *testing.T) {
		out, msg := exportTo(t)
		if !strings.Contains(msg, "2 sessions and 6 turns (left out: 1 pilot and 0 synthetic sessions)") {
			t.Fatalf("got %q, want the counts", msg)
		}
		sessions := readExportCSV(t, filepath.Join(out, "sessions.csv"))
		if len(sessions) != 2 || sessions[0]["rid"] != "FERN-1" || sessions[0]["flag_pasted"] != "1" || sessions[0]["finished"] != "1" ||
			sessions[0]["cov_street"] != "12 Quay Row" || sessions[1]["rid"] != "FERN-2" || sessions[1]["flag_pasted"] != "0" {
			t.Fatalf("got sessions %v, want FERN-1 (pasted, finished) and FERN-2", sessions)
		}
		turns := readExportCSV(t, filepath.Join(out, "turns.csv"))
		want := []struct{ rid, role, typingMS, keystrokes, pastes, hidden string }{
			{"FERN-1", "respondent", "9000", "40", "0", "0"},
			{"FERN-1", "assistant", "", "", "", ""},
			{"FERN-1", "respondent", "1200", "0", "1", "2"},
			{"FERN-1", "assistant", "", "", "", ""},
			{"FERN-2", "respondent", "", "", "", ""},
			{"FERN-2", "assistant", "", "", "", ""},
		}
		if len(turns) != len(want) {
			t.Fatalf("got %d turns, want %d", len(turns), len(want))
		}
		for i, w := range want {
			r := turns[i]
			got := []string{r["rid"], r["role"], r["typing_ms"], r["keystrokes"], r["pastes"], r["hidden_count"]}
			if fmt.Sprint(got) != fmt.Sprint([]string{w.rid, w.role, w.typingMS, w.keystrokes, w.pastes, w.hidden}) {
				t.Fatalf("turn %d: got %v, want %+v", i+1, got, w)
			}
		}
		if n := exportPythonRows(t, out); n != fmt.Sprintf("sessions.csv 3 %d; turns.csv 7 %d; turns.jsonl 6", len(sessions[0]), len(turns[0])) {
			t.Fatalf("Python's csv module read %q, encoding/csv 3 rows of %d and 7 rows of %d columns", n, len(sessions[0]), len(turns[0]))
		}
	})

	t.Run("OKIncludePilotAndRelease", func(t *testing.T) {
		out, msg := exportTo(t, "--include-pilot", "--release")
		if !strings.Contains(msg, "3 sessions and 8 turns, described") || !strings.Contains(msg, "Release copy") {
			t.Fatalf("got %q, want 3 sessions and the release note", msg)
		}
		sessions := readExportCSV(t, filepath.Join(out, "sessions.csv"))
		for _, s := range sessions {
			if strings.HasPrefix(s["rid"], "FERN-") || len(s["rid"]) != 32 {
				t.Fatalf("got rid %q in a release copy, want a 32-digit key", s["rid"])
			}
		}
		if sessions[2]["phase"] != "pilot" {
			t.Fatalf("got phase %q for the pilot session", sessions[2]["phase"])
		}
	})

	for _, tc := range []struct {
		name string
		args []string
		want string
	}{
		{"ErrUnknownStudy", []string{"--db", m.Config.DB, "--study", "no-such-study"}, `study "no-such-study" is not in`},
		{"ErrMissingDatabase", []string{"--db", filepath.Join(t.TempDir(), "absent.db"), "--study", "fernhill-ferry"}, "absent.db"},
		{"ErrNoStudy", []string{"--db", m.Config.DB}, "usage: trialogue export"},
		{"ErrStrayArgument", []string{"--db", m.Config.DB, "--study", "fernhill-ferry", "extra"}, "usage: trialogue export"},
		{"ErrUnknownFlag", []string{"--db", m.Config.DB, "--study", "fernhill-ferry", "--pilot"}, "flag provided but not defined"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			out := filepath.Join(t.TempDir(), "export")
			var stdout, stderr bytes.Buffer
			args := append([]string{"export", "--out", out}, tc.args...)
			if code := run(ctx, args, &stdout, &stderr); code != exitUsage || !strings.Contains(stderr.String(), tc.want) {
				t.Fatalf("got exit %d, stderr %q; want 2 and %q", code, stderr.String(), tc.want)
			}
			if _, err := os.Stat(out); !errors.Is(err, os.ErrNotExist) {
				t.Fatalf("a refused export created %s (stat: %v)", out, err)
			}
		})
	}
	if _, err := os.Stat(filepath.Join(filepath.Dir(m.Config.DB), "absent.db")); !errors.Is(err, os.ErrNotExist) {
		t.Fatal("an export from a missing database created it")
	}
}

// exportPythonRows reads the export with Debian's Python (csv module with
// newline="" as its documentation asks; json per line) and reports rows
// and widths per file. Without /usr/bin/python3 the test skips, unless
// TRIALOGUE_REQUIRE_REFERENCE=1.
func exportPythonRows(t *testing.T, dir string) string {
	t.Helper()
	const python = "/usr/bin/python3"
	if _, err := os.Stat(python); err != nil {
		if os.Getenv("TRIALOGUE_REQUIRE_REFERENCE") == "1" {
			t.Fatalf("TRIALOGUE_REQUIRE_REFERENCE=1 but %s is missing", python)
		}
		t.Skipf("%s is missing", python)
	}
	script := `import csv, json, os, sys
out = []
for name in ("sessions.csv", "turns.csv"):
    with open(os.path.join(sys.argv[1], name), newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f, strict=True))
    widths = {len(r) for r in rows}
    out.append("%s %d %s" % (name, len(rows), " ".join(str(w) for w in sorted(widths))))
with open(os.path.join(sys.argv[1], "turns.jsonl"), encoding="utf-8") as f:
    out.append("turns.jsonl %d" % len([json.loads(l) for l in f]))
print("; ".join(out), end="")
`
	b, err := exec.Command(python, "-c", script, dir).Output()
	if err != nil {
		t.Fatalf("python: %v", err)
	}
	return string(b)
}

// TestBrowserTypingMeasures types replies into the respondent page in
// headless Chromium and checks what the page measured and the store kept:
// every key press counted, a paste counted apart, the page hidden by a
// second tab, and a draft's measures kept across a reload.
func TestBrowserTypingMeasures(t *testing.T) {
	e := newPageEnv(t)
	e.enter(t, "TYPING-1", "")
	began := time.Now()
	typed := "I take the seven o'clock boat"
	e.tabTo(t, "reply")
	e.press(t, typed)
	// A paste as the page sees one: the event the browser fires, then the
	// text it inserts (which is not a key press).
	e.eval(t, `(function () {
		var box = document.getElementById("reply"), dt = new DataTransfer();
		dt.setData("text/plain", " on weekdays");
		box.dispatchEvent(new ClipboardEvent("paste", {clipboardData: dt, bubbles: true, cancelable: true}));
		box.setRangeText(" on weekdays", box.value.length, box.value.length, "end");
		box.dispatchEvent(new InputEvent("input", {inputType: "insertFromPaste", data: " on weekdays", bubbles: true}));
		return "";
	})()`)
	// Another tab of the same window in front hides the page (Chrome hides
	// every tab of a window but the active one).
	other, cancelOther := chromedp.NewContext(e.tab, chromedp.WithNewWindow(false))
	if err := chromedp.Do(other, chromedp.Navigate("about:blank")); err != nil {
		t.Fatal(err)
	}
	if got := e.eval(t, `document.visibilityState`); got != "hidden" {
		t.Fatalf("with another tab in front: got visibility %q, want hidden", got)
	}
	cancelOther()
	if err := chromedp.Do(e.tab, bringToFront); err != nil {
		t.Fatal(err)
	}
	e.wait(t, `document.visibilityState === "visible"`)
	e.press(t, kb.Enter, chromedp.KeyModifiers(chromedp.ModifierCtrl))
	e.wait(t, settled(2))
	elapsed := time.Since(began)

	sess, err := e.m.Store.SessionByRID(context.Background(), "linden-ferry", "TYPING-1")
	if err != nil {
		t.Fatal(err)
	}
	turns, err := e.m.Store.Turns(context.Background(), sess.ID)
	if err != nil {
		t.Fatal(err)
	}
	got := turns[0].Typing
	if turns[0].Text != typed+" on weekdays" || got == nil {
		t.Fatalf("got reply %q with measures %+v, want the typed and pasted text with measures", turns[0].Text, got)
	}
	if got.Keystrokes != int64(len([]rune(typed))) || got.Pastes != 1 || got.HiddenCount != 1 ||
		got.TypingMS < 0 || got.TypingMS > elapsed.Milliseconds() {
		t.Fatalf("got measures %+v, want %d keystrokes, 1 paste, hidden once, and a typing time within the %v the test took",
			got, len([]rune(typed)), elapsed)
	}

	// A draft's measures survive a reload, like the draft.
	e.press(t, "Only ")
	if err := chromedp.Do(e.tab, chromedp.Reload()); err != nil {
		t.Fatal(err)
	}
	e.wait(t, settled(2)+` && !document.getElementById("send").disabled`)
	e.tabTo(t, "reply")
	e.press(t, "on weekdays")
	e.press(t, kb.Enter, chromedp.KeyModifiers(chromedp.ModifierCtrl))
	e.wait(t, settled(4))
	turns, err = e.m.Store.Turns(context.Background(), sess.ID)
	if err != nil {
		t.Fatal(err)
	}
	if g := turns[2].Typing; turns[2].Text != "Only on weekdays" || g == nil || g.Keystrokes != int64(len("Only on weekdays")) || g.Pastes != 0 {
		t.Fatalf("got reply %q with measures %+v, want %d keystrokes across the reload", turns[2].Text, g, len("Only on weekdays"))
	}

	// The export shows the measures and flags the pasted reply.
	out := filepath.Join(t.TempDir(), "export")
	var stdout, stderr bytes.Buffer
	if code := run(context.Background(), []string{"export", "--db", e.m.Config.DB, "--study", "linden-ferry", "--out", out, "--include-pilot"}, &stdout, &stderr); code != exitOK {
		t.Fatalf("export: got exit %d, want 0; stderr %s", code, stderr.String())
	}
	rows := readExportCSV(t, filepath.Join(out, "sessions.csv"))
	if len(rows) != 1 || rows[0]["flag_pasted"] != "1" {
		t.Fatalf("got sessions %v, want TYPING-1 flagged pasted", rows)
	}
	tr := readExportCSV(t, filepath.Join(out, "turns.csv"))
	if tr[0]["pastes"] != "1" || tr[0]["keystrokes"] != fmt.Sprint(len([]rune(typed))) || tr[2]["pastes"] != "0" {
		t.Fatalf("got turns %v and %v, want the measures as stored", tr[0], tr[2])
	}
}

// bringToFront makes the tab the active one of its window.
func bringToFront(ctx context.Context, tg *chromedp.Target) (chromedp.Void, error) {
	_, err := cdp.Call(ctx, tg, page.BringToFront, cdp.Empty{})
	return chromedp.Void{}, err
}
