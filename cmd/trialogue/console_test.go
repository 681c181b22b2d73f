package main

import (
	"archive/zip"
	"bytes"
	"context"
	"encoding/csv"
	"fmt"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/cdproto/browser"
	"github.com/chromedp/chromedp"

	"trialogue/store"
)

// TestUserCommand: accounts are added with a generated one-time password
// or one read from standard input; bad input changes nothing.
func TestUserCommand(t *testing.T) {
	db := filepath.Join(t.TempDir(), "users.db")
	user := func(stdin string, args ...string) (int, string, string) {
		t.Helper()
		var out, errb bytes.Buffer
		code := runUser(context.Background(), args, strings.NewReader(stdin), &out, &errb)
		return code, out.String(), errb.String()
	}
	var generated string
	t.Run("OKGenerated", func(t *testing.T) {
		code, out, errs := user("", "add", "Owner@Example.org", "--role", "owner", "--db", db)
		if code != exitOK {
			t.Fatalf("got exit %d: %s", code, errs)
		}
		m := regexp.MustCompile(`(?m)^  ([a-z2-7]{4}(?:-[a-z2-7]{4}){4})$`).FindStringSubmatch(out)
		if m == nil || !strings.Contains(out, "Added owner@example.org as owner.") {
			t.Fatalf("got %q, want the account and a one-time password", out)
		}
		generated = m[1]
	})
	t.Run("OKFromStdin", func(t *testing.T) {
		code, out, errs := user("a-password-of-my-own\n", "add", "viewer@example.org", "--role", "viewer", "--db", db, "--password-stdin")
		if code != exitOK || strings.Contains(out, "One-time password") {
			t.Fatalf("got exit %d, %q %s; want the account without a generated password", code, out, errs)
		}
	})
	t.Run("OKSignInWorks", func(t *testing.T) {
		st, err := store.Open(context.Background(), db, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		defer st.Close()
		u, err := st.Authenticate(context.Background(), "owner@example.org", generated)
		if err != nil || !u.MustChange || u.Role != store.RoleOwner {
			t.Errorf("generated password: got %+v, %v; want an owner who must replace it", u, err)
		}
		v, err := st.Authenticate(context.Background(), "viewer@example.org", "a-password-of-my-own")
		if err != nil || v.MustChange || v.Role != store.RoleViewer {
			t.Errorf("own password: got %+v, %v; want a viewer with nothing to replace", v, err)
		}
	})
	for _, c := range []struct {
		name, stdin string
		args        []string
		want        string
	}{
		{"ErrDuplicate", "", []string{"add", "OWNER@example.org", "--role", "viewer", "--db", db}, "exists already"},
		{"ErrRole", "", []string{"add", "third@example.org", "--role", "admin", "--db", db}, "--role must be owner or viewer"},
		{"ErrNoRole", "", []string{"add", "third@example.org", "--db", db}, "--role must be owner or viewer"},
		{"ErrAddress", "", []string{"add", "not-an-address", "--role", "viewer", "--db", db}, "not an e-mail address"},
		{"ErrShortStdin", "short\n", []string{"add", "third@example.org", "--role", "viewer", "--db", db, "--password-stdin"}, "shorter than 12"},
		{"ErrNoDB", "", []string{"add", "third@example.org", "--role", "viewer"}, "--db PATH is required"},
		{"ErrResetUnknown", "", []string{"reset", "nobody@example.org", "--db", db}, "no account for nobody@example.org"},
		{"ErrSubcommand", "", []string{"remove", "owner@example.org", "--db", db}, "unknown subcommand"},
		{"ErrListMissingDB", "", []string{"list", "--db", filepath.Join(t.TempDir(), "none.db")}, "none.db"},
	} {
		t.Run(c.name, func(t *testing.T) {
			code, out, errs := user(c.stdin, c.args...)
			if code != exitUsage || !strings.Contains(errs, c.want) {
				t.Fatalf("got exit %d, %q %q; want 2 and %q", code, out, errs, c.want)
			}
			_, list, _ := user("", "list", "--db", db)
			if strings.Count(list, "@example.org") != 2 {
				t.Errorf("got accounts %q, want the two added before", list)
			}
		})
	}
	t.Run("OKResetAndList", func(t *testing.T) {
		code, out, errs := user("", "reset", "viewer@example.org", "--db", db)
		if code != exitOK || !strings.Contains(out, "One-time password") {
			t.Fatalf("got exit %d, %q %s", code, out, errs)
		}
		_, list, _ := user("", "list", "--db", db)
		if !regexp.MustCompile(`viewer@example.org\s+viewer\s+\S+\s+one-time, not yet replaced`).MatchString(list) {
			t.Errorf("got %q, want the viewer listed with a one-time password", list)
		}
	})
}

// TestDemoPrintsConsoleLogin: the demo gives its owner account a new
// password at every start and prints it.
func TestDemoPrintsConsoleLogin(t *testing.T) {
	db := filepath.Join(t.TempDir(), "demo.db")
	var passwords []string
	for range 2 {
		var out bytes.Buffer
		m := &Main{Stdout: &out}
		m.Config = Config{Addr: "127.0.0.1:0", DB: db, Studies: []string{fastDemo(t)}, Demo: true, Synchronous: "FULL",
			LogFormat: "text", ShutdownTimeout: 5 * time.Second}
		if err := m.Run(context.Background()); err != nil {
			t.Fatal(err)
		}
		got := regexp.MustCompile(`/console/login\n    e-mail (\S+), password (\S+)\n`).FindStringSubmatch(out.String())
		if got == nil || got[1] != demoEmail {
			closeMain(t, m)
			t.Fatalf("got %q, want the console address, %s and a password", out.String(), demoEmail)
		}
		if _, err := m.Store.Authenticate(context.Background(), demoEmail, got[2]); err != nil {
			t.Errorf("the printed password does not sign in: %v", err)
		}
		passwords = append(passwords, got[2])
		closeMain(t, m)
	}
	if passwords[0] == passwords[1] {
		t.Errorf("got the same password at both starts, want a new one each time")
	}
}

// consoleInjection is a respondent reply that would run script if the
// console put it into a page as HTML.
const consoleInjection = `I agree <script>window.__pwned = 1</script><img src="x" onerror="window.__pwned = 2"> with that`

// TestBrowserConsole signs a researcher in to the console in headless
// Chromium, watches the monitor count respondents that the test drives
// through the JSON API without reloading, opens the transcript whose reply
// holds a script tag (which must show as text and never run), marks it
// reviewed, and audits the pages with axe-core.
func TestBrowserConsole(t *testing.T) {
	exe, axe := requireBrowser(t)
	dir := t.TempDir()
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Minute)
	defer cancel()
	m := &Main{}
	m.Config = Config{Addr: "127.0.0.1:0", DB: filepath.Join(dir, "console.db"), Studies: []string{fastDemo(t)},
		Synchronous: "FULL", LogFormat: "text", ShutdownTimeout: 5 * time.Second, ConsoleRefresh: 200 * time.Millisecond}
	if err := m.Run(ctx); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { closeMain(t, m) })
	base := "http://" + m.Listener.Addr().String()
	const email, password = "researcher@example.org", "quill-gorge-cable-2027"
	if _, err := m.Store.AddUser(ctx, email, store.RoleOwner, password, false); err != nil {
		t.Fatal(err)
	}

	tab := chromium(t, ctx, exe, dir, chromedp.WindowSize(1280, 1000))
	shots := os.Getenv("TRIALOGUE_SCREENSHOTS")
	if shots == "" {
		shots = t.ArtifactDir()
	} else if err := os.MkdirAll(shots, 0o755); err != nil {
		t.Fatal(err)
	}
	e := &pageEnv{base: base, m: m, tab: tab, axe: axe, shots: shots}
	const monitor = "/console/studies/quillhaven-cable-car/monitor"

	// Signing in from the monitor's address comes back to it.
	if err := chromedp.Do(tab, chromedp.Navigate(base+monitor)); err != nil {
		t.Fatal(err)
	}
	e.wait(t, `location.pathname === "/console/login" && document.getElementById("email") !== null`)
	e.audit(t, "sign-in page")
	if err := chromedp.Do(tab,
		chromedp.SendKeys(chromedp.ID("email"), email),
		chromedp.SendKeys(chromedp.ID("password"), password),
		chromedp.Submit(chromedp.ID("password")),
		chromedp.WaitVisible(chromedp.CSS("[data-monitor]")),
	); err != nil {
		t.Fatalf("sign in: %v", err)
	}
	e.wait(t, `location.pathname === "`+monitor+`" && document.querySelector('[data-field="entered"]') !== null`)
	if got := textOf(t, tab, `[data-field="entered"]`); got != "0" {
		t.Fatalf("entered before any respondent: got %q, want 0", got)
	}
	// A mark that a reload would wipe out.
	e.eval(t, `window.__samePage = "yes"; ""`)

	// Respondents through the JSON API, as the respondent page would send.
	c := client{t, base}
	rid, token := enterChat(t, base)
	sessions := func() int {
		t.Helper()
		all, err := m.Store.SessionsOf(ctx, "quillhaven-cable-car", store.WithSynthetic)
		if err != nil {
			t.Fatal(err)
		}
		return len(all)
	}
	entered := sessions()
	e.wait(t, fmt.Sprintf(`document.querySelector('[data-field="entered"]').textContent === "%d" && window.__samePage === "yes"`, entered))
	t.Logf("the monitor shows %d entries without a reload", entered)

	var st state
	c.do("POST", "/c/"+token+"/resume", "", nil)
	c.do("GET", "/c/"+token+"/state", "", &st)
	for i := st.RepliesUsed; i < st.RepliesMin; i++ {
		body := fmt.Sprintf(`{"text":"Reply number %d about the gorge","client_id":"b%d"}`, i, i)
		if i == 0 {
			// Pasted in, as the page's typing measures say: a flagged reply.
			body = fmt.Sprintf(`{"text":%q,"client_id":"b0","typing":{"typing_ms":2500,"keystrokes":1,"pastes":1,"hidden_count":0}}`, consoleInjection)
		}
		if status := c.do("POST", "/c/"+token+"/reply", body, nil); status != 200 {
			t.Fatalf("reply %d: got status %d", i, status)
		}
	}
	if status := c.do("POST", "/c/"+token+"/finish", "", nil); status != 200 {
		t.Fatalf("finish: got status %d", status)
	}
	e.wait(t, `document.querySelector('[data-field="completed"]').textContent === "1" && window.__samePage === "yes"`)
	e.wait(t, `document.getElementById("entries-chart").complete && document.getElementById("entries-chart").naturalWidth > 0`)
	e.audit(t, "monitor")
	shoot(t, tab, shots, "console-monitor.png")

	// The transcript: found by searching its text, opened from the list.
	sess, err := m.Store.SessionByRID(ctx, "quillhaven-cable-car", rid)
	if err != nil {
		t.Fatal(err)
	}
	if err := chromedp.Do(tab, chromedp.Navigate(base+"/console/studies/quillhaven-cable-car/sessions?cohort=pilot&q=script")); err != nil {
		t.Fatal(err)
	}
	e.wait(t, `document.getElementById("count") !== null`)
	if got := textOf(t, tab, "#count"); got != "Sessions 1–1 of 1." {
		t.Errorf("search for the reply: got %q, want one session", got)
	}
	e.audit(t, "transcript list")
	link := fmt.Sprintf(`#sessions a[href$="/sessions/%d"]`, sess.ID)
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS(link)), chromedp.WaitVisible(chromedp.ID("turns"))); err != nil {
		t.Fatalf("open the transcript: %v", err)
	}
	got := e.eval(t, `(function () {
		var texts = Array.prototype.map.call(document.querySelectorAll("#turns .turn-respondent .text"), function (p) { return p.textContent; });
		return texts[0] || "";
	})()`)
	if got != consoleInjection {
		t.Errorf("the reply as shown: got %q, want the literal text %q", got, consoleInjection)
	}
	if ran := e.eval(t, `String(window.__pwned)`); ran != "undefined" {
		t.Errorf("window.__pwned is %s: the reply's script or handler ran", ran)
	}
	if n := e.eval(t, `String(document.querySelectorAll("#turns script, #turns img").length)`); n != "0" {
		t.Errorf("got %s script or img elements inside the transcript, want 0", n)
	}
	flagged := e.eval(t, `Array.prototype.map.call(document.querySelectorAll("#flags li"), function (li) { return li.textContent; }).join("\n")`)
	if !regexp.MustCompile(`(?m)^pasted reply 1: 1 paste`).MatchString(flagged) {
		t.Errorf("got flags %q, want the pasted reply flagged with its reason", flagged)
	}
	e.audit(t, "transcript")

	if err := chromedp.Do(tab, chromedp.Click(chromedp.ID("mark-reviewed")), chromedp.WaitVisible(chromedp.CSS("#review-state .chip-reviewed"))); err != nil {
		t.Fatalf("mark reviewed: %v", err)
	}
	if notice := textOf(t, tab, ".notice"); !strings.Contains(notice, "review decision was saved") {
		t.Errorf("got notice %q, want the review confirmed", notice)
	}
	shoot(t, tab, shots, "console-transcript.png")
	r, err := m.Store.ReviewOf(ctx, sess.ID)
	if err != nil || !r.Reviewed || r.ByEmail != email {
		t.Errorf("got review %+v, %v; want reviewed by %s", r, err, email)
	}

	if err := chromedp.Do(tab, chromedp.Navigate(base+"/console/studies/quillhaven-cable-car")); err != nil {
		t.Fatal(err)
	}
	e.wait(t, `document.getElementById("checklist") !== null`)
	e.audit(t, "study overview")
	shoot(t, tab, shots, "console-study.png")

	// The export, downloaded as the browser downloads it, with the pilot
	// sessions (the study is in draft).
	downloads := filepath.Join(dir, "downloads")
	if _, err := chromedp.CallBrowser(tab, browser.SetDownloadBehavior, browser.SetDownloadBehaviorParams{
		Behavior: browser.SetDownloadBehaviorBehaviorAllow, DownloadPath: downloads}); err != nil {
		t.Fatalf("allow downloads: %v", err)
	}
	if err := chromedp.Do(tab, chromedp.Click(chromedp.CSS(`input[name="pilot"]`)), chromedp.Click(chromedp.ID("export"))); err != nil {
		t.Fatalf("download the export: %v", err)
	}
	zipPath := waitForFile(t, ctx, downloads, ".zip")
	zr, err := zip.OpenReader(zipPath)
	if err != nil {
		t.Fatalf("the download is not a zip archive: %v", err)
	}
	defer zr.Close()
	for _, zf := range zr.File {
		if !strings.HasSuffix(zf.Name, "/sessions.csv") {
			continue
		}
		rc, err := zf.Open()
		if err != nil {
			t.Fatal(err)
		}
		recs, err := csv.NewReader(rc).ReadAll()
		rc.Close()
		if err != nil {
			t.Fatalf("sessions.csv: %v", err)
		}
		if len(recs) != entered+1 {
			t.Errorf("got %d rows in sessions.csv, want a header and %d sessions", len(recs), entered)
		}
		return
	}
	t.Errorf("the export %s has no sessions.csv", filepath.Base(zipPath))
}

// waitForFile waits until dir holds a finished file whose name ends in
// suffix (Chromium writes a .crdownload file first), and returns its path.
func waitForFile(t *testing.T, ctx context.Context, dir, suffix string) string {
	t.Helper()
	for {
		entries, _ := os.ReadDir(dir)
		for _, en := range entries {
			if strings.HasSuffix(en.Name(), suffix) {
				return filepath.Join(dir, en.Name())
			}
		}
		select {
		case <-ctx.Done():
			t.Fatalf("no %s file appeared in %s: %v", suffix, dir, ctx.Err())
		case <-time.After(50 * time.Millisecond):
		}
	}
}

// TestServeRefusesChangedLiveStudy: once a study is live, starting the
// server with a file that changes its prompts fails with the reason and
// registers nothing; the unchanged file still serves.
func TestServeRefusesChangedLiveStudy(t *testing.T) {
	ctx := context.Background()
	dir := t.TempDir()
	db := filepath.Join(dir, "live.db")
	file := fastDemo(t)
	m := &Main{}
	m.Config = Config{Addr: "127.0.0.1:0", DB: db, Studies: []string{file}, Synchronous: "FULL", LogFormat: "text", ShutdownTimeout: 5 * time.Second}
	if err := m.Run(ctx); err != nil {
		t.Fatal(err)
	}
	for _, c := range []store.PhaseChange{{Study: "quillhaven-cable-car", To: store.PhasePilot}, {Study: "quillhaven-cable-car", To: store.PhaseLive, Version: 1}} {
		if err := m.Store.ChangePhase(ctx, c); err != nil {
			closeMain(t, m)
			t.Fatal(err)
		}
	}
	closeMain(t, m)
	src, err := os.ReadFile(file)
	if err != nil {
		t.Fatal(err)
	}
	changed := filepath.Join(dir, "changed.yaml")
	if err := os.WriteFile(changed, bytes.Replace(src, []byte("politely and with facts"), []byte("forcefully"), 1), 0o600); err != nil {
		t.Fatal(err)
	}
	t.Run("ErrChangedPrompt", func(t *testing.T) {
		code, out := runCmd(t, "serve", "--addr", "127.0.0.1:0", "--db", db, "--study", changed)
		if code != exitFail || !strings.Contains(out, "went live with version 1") || !strings.Contains(out, "arms.debate.system: changed") {
			t.Fatalf("got exit %d: %s; want 1 and the frozen change named", code, out)
		}
		st, err := store.Open(ctx, db, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		defer st.Close()
		if v, err := st.Versions(ctx, "quillhaven-cable-car"); err != nil || len(v) != 1 {
			t.Errorf("got %d versions, %v; want 1: the refused file registered nothing", len(v), err)
		}
	})
	t.Run("OKUnchangedFile", func(t *testing.T) {
		m := &Main{}
		m.Config = Config{Addr: "127.0.0.1:0", DB: db, Studies: []string{file}, Synchronous: "FULL", LogFormat: "text", ShutdownTimeout: 5 * time.Second}
		if err := m.Run(ctx); err != nil {
			t.Fatal(err)
		}
		closeMain(t, m)
	})
}
