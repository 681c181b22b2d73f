package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/store"
)

var (
	buildOnce sync.Once
	buildPath string
	buildErr  error
)

// trialogueBinary builds the real command once per test run.
func trialogueBinary(t *testing.T) string {
	t.Helper()
	buildOnce.Do(func() {
		dir, err := os.MkdirTemp("", "trialogue-bin-")
		if err != nil {
			buildErr = err
			return
		}
		buildPath = filepath.Join(dir, "trialogue")
		out, err := exec.Command("go", "build", "-o", buildPath, ".").CombinedOutput()
		if err != nil {
			buildErr = fmt.Errorf("go build: %w\n%s", err, out)
		}
	})
	if buildErr != nil {
		t.Fatal(buildErr)
	}
	return buildPath
}

// proc is a running trialogue process.
type proc struct {
	cmd    *exec.Cmd
	base   string // http://127.0.0.1:PORT
	stderr *lockedBuffer
	exited chan struct{}
	err    error // Wait's result, once exited is closed
}

type lockedBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (l *lockedBuffer) Write(p []byte) (int, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.Write(p)
}

func (l *lockedBuffer) String() string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return l.b.String()
}

var servingLine = regexp.MustCompile(`on (http://127\.0\.0\.1:\d+)`)

// startProc starts the binary with args and waits until it says where it
// listens. The process is killed when the test ends, if still running.
func startProc(t *testing.T, bin string, args ...string) *proc {
	t.Helper()
	p := &proc{cmd: exec.Command(bin, args...), stderr: &lockedBuffer{}, exited: make(chan struct{})}
	p.cmd.Stderr = p.stderr
	out, err := p.cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := p.cmd.Start(); err != nil {
		t.Fatal(err)
	}
	addr := make(chan string, 1)
	go func() {
		sc := bufio.NewScanner(out)
		sent := false
		for sc.Scan() {
			if m := servingLine.FindStringSubmatch(sc.Text()); m != nil && !sent {
				addr <- m[1]
				sent = true
			}
		}
		if !sent {
			close(addr)
		}
	}()
	go func() { p.err = p.cmd.Wait(); close(p.exited) }()
	t.Cleanup(func() {
		select {
		case <-p.exited:
		default:
			p.cmd.Process.Kill()
			<-p.exited
		}
	})
	base, ok := <-addr
	if !ok {
		<-p.exited
		shown := slices.Clone(args)
		for i, a := range shown {
			if u, err := url.Parse(a); err == nil && u.User != nil {
				shown[i] = u.Redacted() // a database URL's password stays out of the log
			}
		}
		t.Fatalf("trialogue %v did not start: %v\n%s", shown, p.err, p.stderr.String())
	}
	p.base = base
	return p
}

// crashStudy has two chat arms whose scripted answers tell them apart, and
// a message arm; strata by lean. The scripted delay keeps replies in flight.
const crashStudy = `id: crash-ferry
title: Harrow Bay night ferry
covariates:
  - {name: lean, type: choice, values: [left, centre, right], required: true}
strata: [lean]
allocation: {blocks: [3, 6], arms: {pro: 1, con: 1, note: 1}}
endpoints:
  bot: {kind: scripted, chunks: 4, delay: 150ms}
arms:
  pro:
    kind: chat
    endpoint: bot
    replies: {min: 4, max: 4}
    system: Argue for the night ferry.
    script: ["Pro one: the night ferry helps shift workers.", "Pro two: it cuts the drive round the bay.", "Pro three: it runs on the old pier.", "Pro four: thank you for talking."]
  con:
    kind: chat
    endpoint: bot
    replies: {min: 4, max: 4}
    system: Argue against the night ferry.
    script: ["Con one: the night ferry costs too much.", "Con two: few would ride it after ten.", "Con three: the pier needs repairs first.", "Con four: thank you for talking."]
  note:
    kind: message
    endpoint: bot
    system: Write a note.
    prompt: Write one note about the night ferry.
    script: ["Note: the night ferry would leave the old pier at eleven."]
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}&arm={{.arm_code}}"
`

// crashRespondent is what one synthetic respondent saw before the kill.
type crashRespondent struct {
	rid, lean, token string
	kind             string
	firstAnswer      string // the first model text shown: names the arm
	acked            []int  // reply numbers answered with 200 before the kill
	inFlight         int    // reply number sent when the server died; -1 if none
}

func crashPost(ctx context.Context, hc *http.Client, url, body string, v any) (int, error) {
	req, err := http.NewRequestWithContext(ctx, "POST", url, strings.NewReader(body))
	if err != nil {
		return 0, err
	}
	req.Header.Set("Accept", "application/json")
	res, err := hc.Do(req)
	if err != nil {
		return 0, err
	}
	defer res.Body.Close()
	b, err := io.ReadAll(res.Body)
	if err != nil {
		return 0, err
	}
	if v != nil && res.StatusCode == 200 {
		if err := json.Unmarshal(b, v); err != nil {
			return 0, fmt.Errorf("decode %s: %w", b, err)
		}
	}
	return res.StatusCode, nil
}

type crashAnswer struct {
	Reply string `json:"reply"`
	State state  `json:"state"`
}

// TestCrashMidChat builds the real binary, drives 200 respondents through
// chats, kills the server with SIGKILL while replies are in flight, starts
// it again on the same database, and checks that every reply acknowledged
// before the kill is stored exactly once with its answer, every session
// resumes with the same token and arm, and the allocation sequence has no
// slot repeated or skipped.
func TestCrashMidChat(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs 200 respondents")
	}
	bin := trialogueBinary(t)
	dir := t.TempDir()
	studyPath := filepath.Join(dir, "crash.yaml")
	if err := os.WriteFile(studyPath, []byte(crashStudy), 0o600); err != nil {
		t.Fatal(err)
	}
	db := filepath.Join(dir, "crash.db")
	args := []string{"serve", "--study", studyPath, "--db", db, "--addr", "127.0.0.1:0", "--entry-rate", "0", "--reply-rate", "0"}
	p := startProc(t, bin, args...)

	const n = 200
	hc := &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: n}, CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	defer hc.CloseIdleConnections()
	resp := make([]*crashRespondent, n)
	var acks atomic.Int64
	killed := make(chan struct{})
	var wg sync.WaitGroup
	for i := range n {
		r := &crashRespondent{rid: fmt.Sprintf("crash-%03d", i), lean: []string{"left", "centre", "right"}[i%3], inFlight: -1}
		resp[i] = r
		wg.Go(func() { driveUntilKilled(p.base, hc, r, &acks) })
	}
	// Kill once enough replies are acknowledged that every respondent is
	// mid-chat on average, while others are still in flight.
	go func() {
		for acks.Load() < 300 {
			select {
			case <-p.exited:
				return
			default:
				time.Sleep(5 * time.Millisecond)
			}
		}
		p.cmd.Process.Signal(syscall.SIGKILL)
		close(killed)
	}()
	wg.Wait()
	select {
	case <-killed:
	default:
		t.Fatalf("the respondents finished before the kill (%d acks): raise the scripted delay\n%s", acks.Load(), p.stderr.String())
	}
	<-p.exited
	hc.CloseIdleConnections()
	entered, inFlight := 0, 0
	for _, r := range resp {
		if r.token != "" {
			entered++
		}
		if r.inFlight >= 0 {
			inFlight++
		}
	}
	t.Logf("killed after %d acknowledged replies; %d respondents entered, %d replies in flight", acks.Load(), entered, inFlight)
	if inFlight == 0 {
		t.Fatalf("no reply was in flight at the kill: the test did not test a crash mid-reply")
	}

	resumeAllThenStop(t, startProc(t, bin, args...), "the restarted server", hc, resp, db, studyPath)
}

// resumeAllThenStop resumes every respondent through the server p (after
// the kill of the one they were on), stops p with SIGTERM, which must exit
// 0, and checks the database.
func resumeAllThenStop(t *testing.T, p *proc, name string, hc *http.Client, resp []*crashRespondent, db, studyPath string) {
	t.Helper()
	errs := make([]error, len(resp))
	var wg sync.WaitGroup
	for i, r := range resp {
		wg.Go(func() { errs[i] = resumeAfterCrash(p.base, hc, r) })
	}
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			t.Errorf("%s through %s: %v", resp[i].rid, name, err)
		}
	}
	if t.Failed() {
		t.FailNow()
	}
	hc.CloseIdleConnections()
	p.cmd.Process.Signal(syscall.SIGTERM)
	<-p.exited
	if p.err != nil {
		t.Fatalf("%s on SIGTERM: got %v, want exit 0\n%s", name, p.err, p.stderr.String())
	}
	checkCrashDatabase(t, db, studyPath, resp)
}

// driveUntilKilled enters, takes the opening or message if any, and replies
// until the arm's maximum or until the server goes away.
func driveUntilKilled(base string, hc *http.Client, r *crashRespondent, acks *atomic.Int64) {
	ctx := context.Background()
	res, err := hc.Get(base + "/s/crash-ferry?rid=" + r.rid + "&lean=" + r.lean)
	if err != nil {
		return
	}
	res.Body.Close()
	if res.StatusCode != http.StatusSeeOther {
		return
	}
	token := strings.TrimPrefix(res.Header.Get("Location"), "/c/")
	r.token = token
	var a crashAnswer
	if st, err := crashPost(ctx, hc, base+"/c/"+token+"/resume", "", &a); err != nil || st != 200 {
		return
	}
	r.kind = a.State.Kind
	if a.Reply != "" {
		r.firstAnswer = a.Reply
		acks.Add(1)
	}
	if r.kind != "chat" {
		return
	}
	for i := range 4 {
		r.inFlight = i
		st, err := crashPost(ctx, hc, base+"/c/"+token+"/reply", fmt.Sprintf(`{"text":"reply %d about the ferry","client_id":"c%d"}`, i, i), &a)
		if err != nil {
			return // the server died with this reply in flight
		}
		r.inFlight = -1
		if st != 200 {
			return
		}
		if r.firstAnswer == "" {
			r.firstAnswer = a.Reply
		}
		r.acked = append(r.acked, i)
		acks.Add(1)
	}
}

// resumeAfterCrash re-enters a respondent after the restart, checks the
// session is the same, resends the reply that was in flight, and finishes.
func resumeAfterCrash(base string, hc *http.Client, r *crashRespondent) error {
	ctx := context.Background()
	res, err := hc.Get(base + "/s/crash-ferry?rid=" + r.rid + "&lean=" + r.lean)
	if err != nil {
		return err
	}
	res.Body.Close()
	token := strings.TrimPrefix(res.Header.Get("Location"), "/c/")
	if r.token != "" && token != r.token {
		return fmt.Errorf("re-entry after the crash: got another session (token changed)")
	}
	var a crashAnswer
	if st, err := crashPost(ctx, hc, base+"/c/"+token+"/resume", "", &a); err != nil || st != 200 {
		return fmt.Errorf("resume: got %d %v, want 200", st, err)
	}
	if r.kind != "" && a.State.Kind != r.kind {
		return fmt.Errorf("arm kind: got %q, want %q as before the crash", a.State.Kind, r.kind)
	}
	msgs := a.State.Messages
	if r.firstAnswer != "" {
		var first string
		for _, m := range msgs {
			if m.Role == "assistant" {
				first = m.Text
				break
			}
		}
		if first != r.firstAnswer {
			return fmt.Errorf("first model text: got %q, want %q (the same arm as before the crash)", first, r.firstAnswer)
		}
	}
	if a.State.RepliesUsed < len(r.acked) {
		return fmt.Errorf("replies stored: got %d, want at least the %d acknowledged", a.State.RepliesUsed, len(r.acked))
	}
	if a.State.Kind == "chat" {
		// Resend what was in flight under the same client id, then go on.
		from := a.State.RepliesUsed
		if r.inFlight >= 0 {
			from = r.inFlight
		}
		for i := from; i < 4; i++ {
			st, err := crashPost(ctx, hc, base+"/c/"+token+"/reply", fmt.Sprintf(`{"text":"reply %d about the ferry","client_id":"c%d"}`, i, i), &a)
			if err != nil || st != 200 {
				return fmt.Errorf("reply %d after restart: got %d %v, want 200", i, st, err)
			}
		}
		if a.State.RepliesUsed != 4 {
			return fmt.Errorf("replies after resending: got %d, want 4", a.State.RepliesUsed)
		}
	}
	var fin finishAnswerJSON
	if st, err := crashPost(ctx, hc, base+"/c/"+token+"/finish", "", &fin); err != nil || st != 200 {
		return fmt.Errorf("finish: got %d %v, want 200", st, err)
	}
	return nil
}

type finishAnswerJSON struct {
	Code    string `json:"code"`
	ArmCode string `json:"arm_code"`
}

// readBack opens the database (a SQLite path or a PostgreSQL URL) after a
// run of the real server and reads a study back: the store (closed when the
// test ends), the allocation plan of the stored seed, and every session.
func readBack(t *testing.T, db string, def *arms.Study) (*store.Store, *assign.Plan, []store.Session) {
	t.Helper()
	ctx := context.Background()
	st, err := store.Open(ctx, db, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { st.Close() })
	sv, err := st.Study(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	plan, err := assign.NewPlan(sv.Seed, def.Scheme())
	if err != nil {
		t.Fatal(err)
	}
	sessions, err := st.Sessions(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	return st, plan, sessions
}

// checkCrashDatabase reads the database after both runs.
func checkCrashDatabase(t *testing.T, db, studyPath string, resp []*crashRespondent) {
	ctx := context.Background()
	def, _, err := arms.ParseFile(studyPath)
	if err != nil {
		t.Fatal(err)
	}
	st, plan, sessions := readBack(t, db, def)
	if len(sessions) != len(resp) {
		t.Fatalf("sessions: got %d, want %d (one per respondent)", len(sessions), len(resp))
	}
	slots := map[string][]int{}
	byRID := map[string]store.Session{}
	for _, s := range sessions {
		slots[s.Stratum] = append(slots[s.Stratum], s.Slot)
		byRID[s.RID] = s
		if want := plan.Slot(s.Stratum, s.Slot).Arm; s.Arm != want {
			t.Errorf("session %s: got arm %s, want %s from the allocation sequence", s.RID, s.Arm, want)
		}
	}
	for stratum, got := range slots {
		slices.Sort(got)
		for i, s := range got {
			if s != i {
				t.Fatalf("stratum %s: slots %v, want 0..%d with none repeated or skipped", stratum, got, len(got)-1)
			}
		}
	}
	for _, r := range resp {
		s := byRID[r.rid]
		if r.token != "" && s.Token != r.token {
			t.Errorf("%s: token changed", r.rid)
		}
		if r.firstAnswer != "" {
			script := def.Arms[s.Arm].Script
			if !slices.Contains(script, r.firstAnswer) {
				t.Errorf("%s: stored arm %s never says %q, which the respondent saw before the crash", r.rid, s.Arm, r.firstAnswer)
			}
		}
		turns, err := st.Turns(ctx, s.ID)
		if err != nil {
			t.Fatal(err)
		}
		seen := map[string]int{}
		for i, tn := range turns {
			if tn.Index != i {
				t.Fatalf("%s: turn %d has index %d", r.rid, i, tn.Index)
			}
			if tn.Role == store.RoleRespondent {
				seen[tn.ClientID]++
				if i+1 >= len(turns) || turns[i+1].Role != store.RoleAssistant {
					t.Errorf("%s: reply %s has no stored answer after it", r.rid, tn.ClientID)
				}
			}
		}
		for _, a := range r.acked {
			if got := seen[fmt.Sprintf("c%d", a)]; got != 1 {
				t.Errorf("%s: acknowledged reply c%d stored %d times, want 1", r.rid, a, got)
			}
		}
		if def.Arms[s.Arm].Kind == arms.KindChat && len(seen) != 4 {
			t.Errorf("%s: got %d distinct replies, want 4", r.rid, len(seen))
		}
		if !s.Finished() {
			t.Errorf("%s: not finished", r.rid)
		}
	}
}

// shutdownStudy streams each answer slowly, so that SIGTERM arrives while
// one is in flight.
const shutdownStudy = `id: shutdown-ferry
title: Harrow Bay ferry
covariates:
  - {name: lean, type: choice, values: [left, right], required: true}
strata: [lean]
allocation: {blocks: [1], arms: {talk: 1}}
endpoints:
  bot: {kind: scripted, chunks: 8, delay: 2s}
arms:
  talk:
    kind: chat
    endpoint: bot
    replies: {min: 1, max: 2}
    system: Talk about the ferry.
    script: ["The ferry leaves at seven every morning from the old pier.", "Thank you."]
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}"
`

var metricsLine = regexp.MustCompile(`msg="serving metrics" addr=(127\.0\.0\.1:\d+)`)

// TestGracefulShutdown: on SIGTERM the real binary stops taking entries at
// once, lets the reply in flight finish and commit, and exits 0. Before
// that, it checks the server's limits and its separate metrics address.
func TestGracefulShutdown(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary")
	}
	bin := trialogueBinary(t)
	dir := t.TempDir()
	studyPath := filepath.Join(dir, "shutdown.yaml")
	if err := os.WriteFile(studyPath, []byte(shutdownStudy), 0o600); err != nil {
		t.Fatal(err)
	}
	db := filepath.Join(dir, "shutdown.db")
	p := startProc(t, bin, "serve", "--study", studyPath, "--db", db, "--addr", "127.0.0.1:0",
		"--metrics-addr", "127.0.0.1:0", "--shutdown-timeout", "20s")
	hc := &http.Client{Transport: &http.Transport{}, CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	defer hc.CloseIdleConnections()
	enter := func(rid string) (string, error) {
		res, err := hc.Get(p.base + "/s/shutdown-ferry?rid=" + rid + "&lean=left")
		if err != nil {
			return "", err
		}
		res.Body.Close()
		if res.StatusCode != http.StatusSeeOther {
			return "", fmt.Errorf("entry: got %d, want 303", res.StatusCode)
		}
		return strings.TrimPrefix(res.Header.Get("Location"), "/c/"), nil
	}
	token, err := enter("G-1")
	if err != nil {
		t.Fatal(err)
	}

	t.Run("ErrHeaderTooLarge", func(t *testing.T) {
		req, _ := http.NewRequest("GET", p.base+"/healthz", nil)
		req.Header.Set("X-Padding", strings.Repeat("a", 64<<10))
		res, err := hc.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		res.Body.Close()
		// RFC 6585 section 5: 431 Request Header Fields Too Large.
		if res.StatusCode != http.StatusRequestHeaderFieldsTooLarge {
			t.Fatalf("got %d, want 431", res.StatusCode)
		}
	})
	t.Run("OKMetricsOnTheirOwnAddress", func(t *testing.T) {
		m := metricsLine.FindStringSubmatch(p.stderr.String())
		if m == nil {
			t.Fatalf("no metrics address in the log:\n%s", p.stderr.String())
		}
		res, err := hc.Get("http://" + m[1] + "/metrics")
		if err != nil {
			t.Fatal(err)
		}
		body, _ := io.ReadAll(res.Body)
		res.Body.Close()
		if res.StatusCode != 200 || !strings.Contains(string(body), `trialogue_assignments_total{arm="talk",study="shutdown-ferry",synthetic="false"} 1`) {
			t.Fatalf("metrics: got %d\n%.2000s", res.StatusCode, body)
		}
		res, err = hc.Get(p.base + "/metrics")
		if err != nil {
			t.Fatal(err)
		}
		res.Body.Close()
		if res.StatusCode != http.StatusNotFound {
			t.Fatalf("/metrics on the respondents' address: got %d, want 404", res.StatusCode)
		}
	})

	// a reply streams; SIGTERM arrives after its first chunk
	req, _ := http.NewRequest("POST", p.base+"/c/"+token+"/reply", strings.NewReader(`{"text":"When does the ferry leave?","client_id":"g1"}`))
	req.Header.Set("Accept", "text/event-stream")
	res, err := hc.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	defer res.Body.Close()
	sc := bufio.NewScanner(res.Body)
	var events []string
	for sc.Scan() {
		if name, ok := strings.CutPrefix(sc.Text(), "event: "); ok {
			events = append(events, name)
			if name == "chunk" {
				break
			}
		}
	}
	if err := p.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	// New entries are refused while the reply is still streaming.
	refused := make(chan error, 1)
	go func() {
		for i := range 100000 {
			if _, err := enter(fmt.Sprintf("G-late-%d", i)); errors.Is(err, syscall.ECONNREFUSED) {
				refused <- err
				return
			}
		}
	}()
	var refusal error
	select {
	case refusal = <-refused:
	case <-p.exited:
		t.Fatalf("the process exited before refusing entries")
	}
	for sc.Scan() {
		if name, ok := strings.CutPrefix(sc.Text(), "event: "); ok {
			events = append(events, name)
		}
	}
	if events[len(events)-1] != "done" {
		t.Fatalf("the reply in flight: got events %v, want it to finish with done", events)
	}
	t.Logf("entry after SIGTERM refused with: %v", refusal)
	<-p.exited
	if p.err != nil {
		t.Fatalf("exit after SIGTERM: got %v, want status 0\n%s", p.err, p.stderr.String())
	}
	st, err := store.Open(context.Background(), db, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	sessions, err := st.Sessions(context.Background(), "shutdown-ferry")
	if err != nil || len(sessions) < 1 {
		t.Fatalf("sessions: %v %v", sessions, err)
	}
	turns, err := st.Turns(context.Background(), sessions[0].ID)
	if err != nil || len(turns) != 2 || turns[1].Text != "The ferry leaves at seven every morning from the old pier." {
		t.Fatalf("after shutdown: got %d turns (%v), want the reply and its committed answer", len(turns), err)
	}
}

// TestBackupCommand copies the database of a running server.
func TestBackupCommand(t *testing.T) {
	dir := t.TempDir()
	db := filepath.Join(dir, "live.db")
	m, base := startMain(t, db)
	defer m.Close()
	enterChat(t, base)
	out := filepath.Join(dir, "copy.db")
	t.Run("OK", func(t *testing.T) {
		var o, e bytes.Buffer
		if code := run(context.Background(), []string{"backup", "--db", db, "--out", out}, &o, &e); code != exitOK {
			t.Fatalf("got exit %d, want 0: %s", code, e.String())
		}
		if !strings.Contains(o.String(), "integrity check ok") {
			t.Fatalf("got %q", o.String())
		}
		st, err := store.Open(context.Background(), out, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		defer st.Close()
		a, _ := m.Store.Sessions(context.Background(), "quillhaven-cable-car")
		b, err := st.Sessions(context.Background(), "quillhaven-cable-car")
		if err != nil || len(b) != len(a) || len(a) == 0 {
			t.Fatalf("sessions in the copy: got %d (%v), want %d", len(b), err, len(a))
		}
	})
	t.Run("ErrOutputExists", func(t *testing.T) {
		var o, e bytes.Buffer
		if code := run(context.Background(), []string{"backup", "--db", db, "--out", out}, &o, &e); code != exitFail || !strings.Contains(e.String(), "already exists") {
			t.Fatalf("got exit %d %q, want 1 saying the file exists", code, e.String())
		}
	})
	t.Run("ErrNoOut", func(t *testing.T) {
		var o, e bytes.Buffer
		if code := run(context.Background(), []string{"backup", "--db", db}, &o, &e); code != exitUsage {
			t.Fatalf("got exit %d, want 2", code)
		}
	})
	t.Run("ErrPostgresURL", func(t *testing.T) {
		var o, e bytes.Buffer
		pg := "postgres://trialogue@127.0.0.1:5432/trialogue"
		code := run(context.Background(), []string{"backup", "--db", pg, "--out", filepath.Join(t.TempDir(), "pg.db")}, &o, &e)
		if code != exitUsage || !strings.Contains(e.String(), "pg_dump") {
			t.Fatalf("got exit %d %q, want 2 pointing to pg_dump", code, e.String())
		}
	})
}
