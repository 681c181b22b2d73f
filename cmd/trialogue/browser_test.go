package main

import (
	"context"
	"errors"
	"fmt"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"runtime/pprof"
	"strings"
	"testing"
	"time"

	"github.com/chromedp/cdproto/target"
	"github.com/chromedp/chromedp"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/server"
	"trialogue/store"
)

const demoStudyPath = "../../testdata/demo-study.yaml"

// findChromium returns the Chromium binary to drive, or "" if there is none.
func findChromium() string {
	for _, p := range []string{"/usr/lib/chromium/chromium", "/usr/bin/chromium"} {
		if fi, err := os.Stat(p); err == nil && !fi.IsDir() {
			return p
		}
	}
	for _, name := range []string{"chromium", "chromium-browser"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	return ""
}

// browserReplies are what the respondent types, one per turn: made up,
// and each long enough for any chat arm of the demo study.
var browserReplies = []string{
	"I take the bus to the east rim most weeks.",
	"Forty minutes is long, but the bond worries me.",
	"I would like to hear how loud the cars are.",
	"Maybe, if fares stay low for older residents.",
	"Thanks, that was useful to think about.",
}

// TestBrowserDemo walks one respondent through the demo in headless
// Chromium: the stand-in survey page embeds the respondent page from the
// other site, the respondent chats until Continue appears, and the survey
// page receives a completion code that verifies.
func TestBrowserDemo(t *testing.T) {
	if testing.Short() {
		t.Skip("browser test skipped in -short mode")
	}
	exe := findChromium()
	if exe == "" {
		if os.Getenv("TRIALOGUE_REQUIRE_BROWSER") == "1" {
			t.Fatal("TRIALOGUE_REQUIRE_BROWSER=1 but no Chromium found at /usr/lib/chromium/chromium, /usr/bin/chromium or as chromium in PATH")
		}
		t.Skip("no Chromium found; install chromium or set TRIALOGUE_REQUIRE_BROWSER=1 to make this a failure")
	}
	shots := os.Getenv("TRIALOGUE_SCREENSHOTS")
	if shots == "" {
		shots = t.TempDir()
	} else if err := os.MkdirAll(shots, 0o755); err != nil {
		t.Fatal(err)
	}
	def, _, err := arms.ParseFile(demoStudyPath)
	if err != nil {
		t.Fatal(err)
	}

	ctx, cancel := context.WithTimeout(context.Background(), 90*time.Second)
	defer cancel()

	m := &Main{}
	m.Config = Config{Addr: "127.0.0.1:0", DB: filepath.Join(t.TempDir(), "demo.db"),
		Studies: []string{demoStudyPath}, Demo: true, Synchronous: "FULL", LogFormat: "text",
		ShutdownTimeout: 5 * time.Second}
	if err := m.Run(ctx); err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { closeMain(t, m) })
	hostSite, frameSite := server.DemoSites(m.Listener.Addr())

	top := chromium(t, ctx, exe, t.TempDir(), chromedp.WindowSize(1000, 1100))

	// Each load of the host page is a new respondent with a random arm:
	// load it until a chat arm comes up.
	var (
		frame  context.Context
		rid    string
		sess   store.Session
		seen   = map[target.ID]bool{}
		isChat bool
	)
	for attempt := 1; attempt <= 15 && !isChat; attempt++ {
		if err := chromedp.Do(top, chromedp.Navigate(hostSite+"/demo/host")); err != nil {
			t.Fatalf("load host page: %v", err)
		}
		rid, err = chromedp.Run(top, chromedp.Text(chromedp.CSS(".meta code")))
		if err != nil {
			t.Fatalf("read respondent id: %v", err)
		}
		var cancelFrame context.CancelFunc
		frame, cancelFrame = attachFrame(t, top, frameSite, seen)
		defer cancelFrame()
		if err := waitFor(frame, `document.getElementById("counter") !== null && document.readyState === "complete"`); err != nil {
			t.Fatalf("respondent page did not load: %v", err)
		}
		isChat, err = chromedp.Run(frame, chromedp.Evaluate[bool](`!document.getElementById("reply-form").hidden`))
		if err != nil {
			t.Fatalf("read arm kind: %v", err)
		}
		sess, err = m.Store.SessionByRID(ctx, def.ID, rid)
		if err != nil {
			t.Fatalf("session of %s: %v", rid, err)
		}
		if kind := def.Arms[sess.Arm].Kind; (kind == arms.KindChat) != isChat {
			t.Fatalf("arm %q is %s, but the page shows the reply form: %v", sess.Arm, kind, isChat)
		}
		t.Logf("attempt %d: respondent %s got arm %s", attempt, rid, sess.Arm)
	}
	if !isChat {
		t.Fatal("no chat arm came up in 15 respondents")
	}
	arm := def.Arms[sess.Arm]
	script := arm.Script

	// The opening message, if the arm has one, streams in on load.
	assistant := 0
	if arm.Opening {
		if err := waitFor(frame, `document.querySelectorAll("#log li.assistant").length === 1 && !document.getElementById("send").disabled`); err != nil {
			t.Fatalf("opening message: %v", err)
		}
		checkLast(t, frame, "assistant", script[0])
		assistant = 1
	} else if err := waitFor(frame, `document.getElementById("counter").textContent !== "" && !document.getElementById("send").disabled`); err != nil {
		t.Fatalf("reply form not ready: %v", err)
	}

	sent := 0
	for {
		visible, err := chromedp.Run(frame, chromedp.Evaluate[bool](`!document.getElementById("continue").hidden`))
		if err != nil {
			t.Fatal(err)
		}
		if visible {
			break
		}
		if sent == len(browserReplies) {
			t.Fatalf("Continue not shown after %d replies (min %d)", sent, arm.RepliesOf().Min)
		}
		text := browserReplies[sent]
		if err := chromedp.Do(frame,
			chromedp.Click(chromedp.ID("reply")),
			chromedp.SendKeys(chromedp.ID("reply"), text),
			chromedp.Click(chromedp.ID("send")),
		); err != nil {
			t.Fatalf("send reply %d: %v", sent+1, err)
		}
		sent++
		want := assistant + sent + 1
		if err := waitFor(frame, fmt.Sprintf(`document.querySelectorAll("#log li").length === %d && document.getElementById("draft").hidden && document.getElementById("status").textContent === ""`, want)); err != nil {
			t.Fatalf("model reply %d did not appear in the log: %v", sent, err)
		}
		checkLast(t, frame, "respondent", text)
		checkLast(t, frame, "assistant", script[assistant%len(script)])
		assistant++

		if sent == 1 {
			shoot(t, top, shots, "host-mid-chat.png")
		}
		if sent == 2 {
			phoneShot(t, top, frame, shots)
		}
	}
	if want := arm.RepliesOf().Min; sent != want {
		t.Errorf("Continue appeared after %d replies, want %d", sent, want)
	}

	// The host page records what host.js writes into #completion, so that it
	// can be read back after the top window has moved on to the return page.
	if err := chromedp.Do(top, chromedp.Evaluate[chromedp.Void](`(function () {
		var out = document.getElementById("completion");
		new MutationObserver(function () {
			if (out.dataset.code) sessionStorage.setItem("trialogue-test-completion", out.textContent + "|" + out.dataset.code);
		}).observe(out, {childList: true, characterData: true, subtree: true, attributes: true});
	})()`)); err != nil {
		t.Fatal(err)
	}
	if err := chromedp.Do(frame, chromedp.Click(chromedp.ID("continue"))); err != nil {
		t.Fatalf("click Continue: %v", err)
	}

	// The top window ends at the demo's return page.
	if err := chromedp.Do(top, chromedp.WaitVisible(chromedp.ID("valid"))); err != nil {
		t.Fatalf("return page: %v", err)
	}
	loc, err := chromedp.Run(top, chromedp.Location())
	if err != nil {
		t.Fatal(err)
	}
	u, err := url.Parse(loc)
	if err != nil {
		t.Fatal(err)
	}
	if got := u.Scheme + "://" + u.Host + u.Path; got != hostSite+"/demo/done" {
		t.Errorf("top window at %s, want %s/demo/done", got, hostSite)
	}
	code := textOf(t, top, "#code")
	valid := textOf(t, top, "#valid")
	gotRID := textOf(t, top, "#rid")
	armCode := textOf(t, top, "#arm")
	shoot(t, top, shots, "done.png")
	if !regexp.MustCompile(`^[0-9A-HJKMNP-TV-Z]{5}-[0-9A-HJKMNP-TV-Z]{5}$`).MatchString(code) {
		t.Errorf("code %q, want the form XXXXX-XXXXX", code)
	}
	if valid != "valid" {
		t.Errorf("#valid reads %q, want %q", valid, "valid")
	}
	if gotRID != rid {
		t.Errorf("return page rid %q, want %q", gotRID, rid)
	}
	if armCode != sess.ArmCode {
		t.Errorf("return page arm code %q, want %q", armCode, sess.ArmCode)
	}
	sv, err := m.Store.Study(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if want := codes.Completion(sv.Secret, def.ID, rid); code != want {
		t.Errorf("code %q, want %q", code, want)
	}
	posted, err := chromedp.Run(top, chromedp.Evaluate[string](`sessionStorage.getItem("trialogue-test-completion") || ""`))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.HasSuffix(posted, "|"+code) || !strings.Contains(posted, rid) {
		t.Errorf("host page #completion recorded %q, want the respondent %s and code %s", posted, rid, code)
	}

	// The database holds the whole conversation and the session is finished.
	sess, err = m.Store.SessionByRID(ctx, def.ID, rid)
	if err != nil {
		t.Fatal(err)
	}
	if !sess.Finished() {
		t.Error("session not finished")
	}
	turns, err := m.Store.Turns(ctx, sess.ID)
	if err != nil {
		t.Fatal(err)
	}
	if want := assistant + sent; len(turns) != want {
		t.Fatalf("%d turns stored, want %d", len(turns), want)
	}
	replies := 0
	for i, tr := range turns {
		wantRole := store.RoleRespondent
		if arm.Opening == (i%2 == 0) {
			wantRole = store.RoleAssistant
		}
		if tr.Role != wantRole {
			t.Errorf("turn %d role %s, want %s", i, tr.Role, wantRole)
		}
		if tr.Role == store.RoleRespondent {
			if tr.Text != browserReplies[replies] {
				t.Errorf("turn %d text %q, want %q", i, tr.Text, browserReplies[replies])
			}
			replies++
		}
	}
}

// closeMain stops the server. A Close that does not return is reported
// with the goroutines' stacks instead of hanging the test run.
func closeMain(t *testing.T, m *Main) {
	t.Helper()
	done := make(chan error, 1)
	go func() { done <- m.Close() }()
	select {
	case err := <-done:
		if err != nil {
			t.Errorf("close: %v", err)
		}
	case <-time.After(m.Config.ShutdownTimeout + 10*time.Second):
		var b strings.Builder
		if err := pprof.Lookup("goroutine").WriteTo(&b, 2); err != nil {
			t.Errorf("goroutine dump: %v", err)
		}
		t.Errorf("Close did not return; goroutines:\n%s", b.String())
	}
}

// attachFrame waits for the cross-site iframe of the page in top to appear
// as its own target, and returns a context on it. Targets in seen belong to
// earlier loads of the host page and are skipped.
func attachFrame(t *testing.T, top context.Context, frameSite string, seen map[target.ID]bool) (context.Context, context.CancelFunc) {
	t.Helper()
	for {
		infos, err := chromedp.Targets(top)
		if err != nil {
			t.Fatalf("list targets: %v", err)
		}
		for _, ti := range infos {
			if ti.Type == "iframe" && !seen[ti.TargetID] && strings.HasPrefix(ti.URL, frameSite+"/c/") {
				seen[ti.TargetID] = true
				ctx, cancel := chromedp.NewContext(top, chromedp.WithTargetID(ti.TargetID), chromedp.WithDetachOnCancel())
				if err := chromedp.Do(ctx); err != nil {
					cancel()
					t.Fatalf("attach to the respondent frame: %v", err)
				}
				return ctx, cancel
			}
		}
		select {
		case <-top.Done():
			t.Fatalf("respondent frame never appeared: %v", context.Cause(top))
		case <-time.After(50 * time.Millisecond):
		}
	}
}

// waitFor waits until a JavaScript condition holds in the page of ctx.
func waitFor(ctx context.Context, cond string) error {
	ok, err := chromedp.Run(ctx, chromedp.Poll[bool](cond,
		chromedp.WithPollingInterval(50*time.Millisecond), chromedp.WithPollingTimeout(60*time.Second)))
	if err != nil {
		return fmt.Errorf("waiting for %s: %w", cond, err)
	}
	if !ok {
		return errors.New("condition not met: " + cond)
	}
	return nil
}

// checkLast checks that the last message of role ("assistant" or
// "respondent") in the log reads want.
func checkLast(t *testing.T, frame context.Context, role, want string) {
	t.Helper()
	got, err := chromedp.Run(frame, chromedp.Evaluate[string](`(function () {
		var all = document.querySelectorAll("#log li.`+role+` p");
		return all.length ? all[all.length - 1].textContent : "";
	})()`))
	if err != nil {
		t.Fatal(err)
	}
	if got != want {
		t.Errorf("last %s message %q, want %q", role, got, want)
	}
}

// textOf returns the trimmed text of the first element matching sel.
func textOf(t *testing.T, ctx context.Context, sel string) string {
	t.Helper()
	s, err := chromedp.Run(ctx, chromedp.Text(chromedp.CSS(sel)))
	if err != nil {
		t.Fatalf("read %s: %v", sel, err)
	}
	return strings.TrimSpace(s)
}

// shoot saves a screenshot of the page of ctx.
func shoot(t *testing.T, ctx context.Context, dir, name string) {
	t.Helper()
	png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
	if err != nil {
		t.Fatalf("screenshot %s: %v", name, err)
	}
	if err := os.WriteFile(filepath.Join(dir, name), png, 0o644); err != nil {
		t.Fatal(err)
	}
}

// phoneShot opens the respondent page of frame in a second tab 360 px wide
// and saves a screenshot of it. The tab only reads the session's state.
func phoneShot(t *testing.T, top, frame context.Context, dir string) {
	t.Helper()
	href, err := chromedp.Run(frame, chromedp.Location())
	if err != nil {
		t.Fatal(err)
	}
	tab, cancel := chromedp.NewContext(top)
	defer cancel()
	if err := chromedp.Do(tab,
		chromedp.EmulateViewport(360, 740, chromedp.EmulateMobile),
		chromedp.Navigate(href),
	); err != nil {
		t.Fatalf("open respondent page at phone width: %v", err)
	}
	if err := waitFor(tab, `document.getElementById("counter").textContent !== "" && !document.getElementById("send").disabled`); err != nil {
		t.Fatal(err)
	}
	shoot(t, tab, dir, "respondent-phone.png")
	full, err := chromedp.Run(tab, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatalf("full-page screenshot: %v", err)
	}
	if err := os.WriteFile(filepath.Join(dir, "respondent-phone-full.png"), full, 0o644); err != nil {
		t.Fatal(err)
	}
}

// chromium starts headless Chromium in a fresh profile under dir, with the
// flags this machine needs to run it as root without reaching the network
// (../shared/TOOLCHAIN.md, "Chromium and chromedp"); extra options, such as a
// window size, come last. Chromium ends with the test.
func chromium(t *testing.T, ctx context.Context, exe, dir string, extra ...chromedp.ExecAllocatorOption) context.Context {
	t.Helper()
	opts := append(chromedp.DefaultExecAllocatorOptions[:],
		chromedp.ExecPath(exe), chromedp.Headless, chromedp.NoSandbox, chromedp.DisableGPU,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("no-first-run", true),
		chromedp.Flag("disable-quic", true),
		chromedp.UserDataDir(filepath.Join(dir, "chromium")),
	)
	allocCtx, cancelAlloc := chromedp.NewExecAllocator(ctx, append(opts, extra...)...)
	t.Cleanup(cancelAlloc)
	tab, cancelTab := chromedp.NewContext(allocCtx)
	t.Cleanup(cancelTab)
	return tab
}
