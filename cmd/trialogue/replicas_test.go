package main

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"net/http"
	"net/url"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/store"
	"trialogue/store/pgtest"
)

// replicaDB gives the test a fresh PostgreSQL database and returns its URL
// without a password: a password the server needs goes to PGPASSWORD, which
// this process and the servers it starts read, so that no URL printed by a
// test (arguments of a server that did not start, say) ever carries one.
func replicaDB(t *testing.T) string {
	t.Helper()
	u, err := url.Parse(pgtest.Database(t))
	if err != nil {
		t.Fatal("the test database's URL does not parse")
	}
	if pw, ok := u.User.Password(); ok {
		t.Setenv("PGPASSWORD", pw)
		u.User = url.User(u.User.Username())
	}
	return u.String()
}

// writeCrashStudy writes crashStudy to a file in dir.
func writeCrashStudy(t *testing.T, dir string) string {
	t.Helper()
	path := filepath.Join(dir, "crash.yaml")
	if err := os.WriteFile(path, []byte(crashStudy), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// serveArgs are the arguments of a replica without rate limits.
func serveArgs(studyPath, db string) []string {
	return []string{"serve", "--study", studyPath, "--db", db, "--addr", "127.0.0.1:0", "--entry-rate", "0", "--reply-rate", "0"}
}

// noRedirects is a client that shows redirects instead of following them.
func noRedirects(conns int, timeout time.Duration) *http.Client {
	return &http.Client{Transport: &http.Transport{MaxIdleConnsPerHost: conns}, Timeout: timeout,
		CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
}

// enterAt enters rid on a replica and returns the answer's status and token.
func enterAt(hc *http.Client, base, rid, lean string) (int, string, error) {
	res, err := hc.Get(base + "/s/crash-ferry?rid=" + rid + "&lean=" + lean)
	if err != nil {
		return 0, "", err
	}
	io.Copy(io.Discard, res.Body)
	res.Body.Close()
	return res.StatusCode, strings.TrimPrefix(res.Header.Get("Location"), "/c/"), nil
}

// TestReplicasShareOneDatabase: two server processes on one PostgreSQL
// database take 2,000 entries at once, some respondents sent to both at the
// same moment. Each respondent gets one session, the same from either
// replica; each stratum's slots are taken once each, in order, with the
// seed's arms; complete blocks hold the arms in the allocation ratio; and
// `trialogue verify` finds the chain whole.
func TestReplicasShareOneDatabase(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs two servers on PostgreSQL")
	}
	db := replicaDB(t)
	bin := trialogueBinary(t)
	studyPath := writeCrashStudy(t, t.TempDir())
	reps := []*proc{startProc(t, bin, serveArgs(studyPath, db)...), startProc(t, bin, serveArgs(studyPath, db)...)}

	const n, inFlight, both = 2000, 256, 10 // every both-th respondent enters at both replicas at once
	hc := noRedirects(inFlight, time.Minute)
	defer hc.CloseIdleConnections()
	type entry struct {
		status [2]int
		token  [2]string
		err    error
	}
	got := make([]entry, n)
	rid := func(i int) string { return fmt.Sprintf("rep-%04d", i) }
	lean := func(i int) string { return []string{"left", "centre", "right"}[i%3] }
	sem := make(chan struct{}, inFlight)
	var wg sync.WaitGroup
	start := time.Now()
	for i := range n {
		sem <- struct{}{}
		wg.Go(func() {
			defer func() { <-sem }()
			e := &got[i]
			if i%both != 0 {
				e.status[0], e.token[0], e.err = enterAt(hc, reps[i%2].base, rid(i), lean(i))
				return
			}
			// Both requests wait on one signal, so that they reach the
			// replicas together.
			ready := make(chan struct{})
			var errs [2]error
			var pair sync.WaitGroup
			for k := range 2 {
				pair.Go(func() {
					<-ready
					e.status[k], e.token[k], errs[k] = enterAt(hc, reps[k].base, rid(i), lean(i))
				})
			}
			close(ready)
			pair.Wait()
			e.err = errors.Join(errs[:]...)
		})
	}
	wg.Wait()
	elapsed := time.Since(start)
	t.Logf("%d entries (%d requests, %d rids at both replicas) in %v across two replicas: %.0f entries/s",
		n, n+n/both, n/both, elapsed.Round(time.Millisecond), float64(n)/elapsed.Seconds())
	tokens := map[string]string{} // rid -> token
	for i, e := range got {
		sent := 1
		if i%both == 0 {
			sent = 2
		}
		if e.err != nil {
			t.Fatalf("%s: %v", rid(i), e.err)
		}
		for k := range sent {
			if e.status[k] != http.StatusSeeOther || e.token[k] == "" {
				t.Fatalf("%s at replica %d: got %d with token %t, want 303 to /c/TOKEN\n%s", rid(i), k, e.status[k], e.token[k] != "", reps[k].stderr.String())
			}
		}
		if sent == 2 && e.token[0] != e.token[1] {
			t.Errorf("%s sent to both replicas at once: got two sessions (tokens differ), want one", rid(i))
		}
		tokens[rid(i)] = e.token[0]
	}
	if t.Failed() {
		t.FailNow()
	}

	def, _, err := arms.ParseFile(studyPath)
	if err != nil {
		t.Fatal(err)
	}
	_, plan, sessions := readBack(t, db, def)
	if len(sessions) != n {
		t.Fatalf("sessions: got %d, want %d (one per respondent)", len(sessions), n)
	}
	type blockKey struct {
		stratum string
		block   int
	}
	type block struct {
		size, used int
		arms       map[string]int
	}
	blocks := map[blockKey]*block{}
	slots := map[string][]int{}
	seen := map[string]bool{}
	for _, s := range sessions {
		if seen[s.RID] {
			t.Errorf("%s: more than one session", s.RID)
		}
		seen[s.RID] = true
		if want, ok := tokens[s.RID]; !ok || s.Token != want {
			t.Errorf("%s: stored session is not the one the entry answered with (known rid %t)", s.RID, ok)
		}
		slots[s.Stratum] = append(slots[s.Stratum], s.Slot)
		p := plan.Slot(s.Stratum, s.Slot)
		if s.Arm != p.Arm {
			t.Errorf("%s: got arm %s at slot %d of %s, want %s from the allocation sequence", s.RID, s.Arm, s.Slot, s.Stratum, p.Arm)
		}
		k := blockKey{s.Stratum, p.Block}
		if blocks[k] == nil {
			blocks[k] = &block{size: p.BlockSize, arms: map[string]int{}}
		}
		blocks[k].used++
		blocks[k].arms[s.Arm]++
	}
	if len(slots) != 3 {
		t.Errorf("strata: got %d, want 3 (one per lean)", len(slots))
	}
	for stratum, got := range slots {
		slices.Sort(got)
		for i, s := range got {
			if s != i {
				t.Fatalf("stratum %s: slot %d where %d belongs, want 0..%d with none repeated or skipped", stratum, s, i, len(got)-1)
			}
		}
	}
	ratio := def.Scheme().Arms
	sum := 0
	for _, r := range ratio {
		sum += r.Weight
	}
	complete := 0
	for k, b := range blocks {
		if b.used != b.size {
			continue
		}
		complete++
		for _, r := range ratio {
			// Each arm fills its share of the block: a third here (1:1:1).
			if want := b.size * r.Weight / sum; b.arms[r.Arm] != want {
				t.Errorf("stratum %s block %d (size %d): arm %s %d times, want %d", k.stratum, k.block, b.size, r.Arm, b.arms[r.Arm], want)
			}
		}
	}
	if complete < len(blocks)-3 {
		t.Errorf("complete blocks: got %d of %d, want all but at most the last of each stratum", complete, len(blocks))
	}
	t.Logf("%d blocks, %d complete and balanced", len(blocks), complete)

	out, err := exec.Command(bin, "verify", "--db", db, "--study", def.ID).CombinedOutput()
	if err != nil {
		t.Fatalf("trialogue verify: got %v, want exit 0\n%s", err, out)
	}
	t.Logf("trialogue verify:\n%s", out)
}

// TestReplicaKilledMidLoad: 200 respondents chat through two replicas;
// replica A is killed with SIGKILL mid-load. Replica B keeps serving, and
// every respondent, A's included, resumes through B with the same session
// and arm, the acknowledged replies in place, the reply in flight resent
// once; the database then holds each reply once and each slot once.
func TestReplicaKilledMidLoad(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs two servers on PostgreSQL")
	}
	db := replicaDB(t)
	bin := trialogueBinary(t)
	studyPath := writeCrashStudy(t, t.TempDir())
	a := startProc(t, bin, serveArgs(studyPath, db)...)
	b := startProc(t, bin, serveArgs(studyPath, db)...)

	const n = 200
	hc := noRedirects(n, 0)
	defer hc.CloseIdleConnections()
	resp := make([]*crashRespondent, n)
	var acksA, acksB atomic.Int64 // replies acknowledged by each replica
	killed := make(chan struct{})
	var wg sync.WaitGroup
	for i := range n {
		r := &crashRespondent{rid: fmt.Sprintf("kill-%03d", i), lean: []string{"left", "centre", "right"}[i%3], inFlight: -1}
		resp[i] = r
		if i%2 == 0 {
			wg.Go(func() { driveUntilKilled(a.base, hc, r, &acksA) })
		} else {
			wg.Go(func() { driveUntilKilled(b.base, hc, r, &acksB) })
		}
	}
	// Kill A once the respondents are mid-chat on average, while others
	// are still in flight.
	go func() {
		for acksA.Load()+acksB.Load() < 300 {
			select {
			case <-a.exited:
				return
			default:
				time.Sleep(5 * time.Millisecond)
			}
		}
		a.cmd.Process.Signal(syscall.SIGKILL)
		close(killed)
	}()
	wg.Wait()
	select {
	case <-killed:
	default:
		t.Fatalf("the respondents finished before the kill: raise the scripted delay\n%s", a.stderr.String())
	}
	<-a.exited
	hc.CloseIdleConnections()
	inFlightA, enteredA := 0, 0
	for i, r := range resp {
		if i%2 == 0 {
			if r.token != "" {
				enteredA++
			}
			if r.inFlight >= 0 {
				inFlightA++
			}
		}
	}
	t.Logf("replica A killed after %d replies acknowledged by A (%d by B by the end); %d of A's %d respondents entered, %d replies in flight at A",
		acksA.Load(), acksB.Load(), enteredA, n/2, inFlightA)
	if inFlightA == 0 {
		t.Fatalf("no reply was in flight at replica A when it was killed: the test did not test a kill mid-reply")
	}

	resumeAllThenStop(t, b, "replica B", hc, resp, db, studyPath)
}

// dbProxy forwards TCP connections to the database and can cut them: it
// closes every open connection and stops listening, so that new ones are
// refused, until it is restored on the same address.
type dbProxy struct {
	target string
	addr   string // host:port it listens on

	mu    sync.Mutex
	ln    net.Listener // nil while cut
	conns map[net.Conn]struct{}
}

func startDBProxy(t *testing.T, target string) *dbProxy {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	p := &dbProxy{target: target, addr: ln.Addr().String(), ln: ln, conns: map[net.Conn]struct{}{}}
	go p.accept(ln)
	t.Cleanup(p.cut)
	return p
}

func (p *dbProxy) accept(ln net.Listener) {
	for {
		c, err := ln.Accept()
		if err != nil {
			return // closed by cut
		}
		up, err := net.Dial("tcp", p.target)
		if err != nil {
			c.Close()
			continue
		}
		p.mu.Lock()
		if p.ln != ln { // cut meanwhile
			p.mu.Unlock()
			c.Close()
			up.Close()
			continue
		}
		p.conns[c], p.conns[up] = struct{}{}, struct{}{}
		p.mu.Unlock()
		go p.pipe(up, c)
		go p.pipe(c, up)
	}
}

// pipe copies one direction; when either side ends, both are closed.
func (p *dbProxy) pipe(dst, src net.Conn) {
	io.Copy(dst, src)
	dst.Close()
	src.Close()
	p.mu.Lock()
	delete(p.conns, dst)
	delete(p.conns, src)
	p.mu.Unlock()
}

// cut closes every connection and refuses new ones.
func (p *dbProxy) cut() {
	p.mu.Lock()
	defer p.mu.Unlock()
	if p.ln != nil {
		p.ln.Close()
		p.ln = nil
	}
	for c := range p.conns {
		c.Close()
	}
	clear(p.conns)
}

// restore listens again on the same address.
func (p *dbProxy) restore(t *testing.T) {
	t.Helper()
	p.mu.Lock()
	defer p.mu.Unlock()
	ln, err := net.Listen("tcp", p.addr)
	if err != nil {
		t.Fatalf("restore the database proxy on %s: %v", p.addr, err)
	}
	p.ln = ln
	go p.accept(ln)
}

// replyAt sends a chat reply and returns the answer's status.
func replyAt(hc *http.Client, base, token, clientID string) (int, error) {
	return crashPost(context.Background(), hc, base+"/c/"+token+"/reply",
		fmt.Sprintf(`{"text":"reply %s about the ferry","client_id":"%s"}`, clientID, clientID), nil)
}

// TestReplicaDatabaseOutage: a server reaches PostgreSQL through a proxy
// that the test cuts. While the database is away, /readyz says not ready
// and respondents' entries and replies get an error status promptly, never
// a 200 and never a hang; once it is back, /readyz recovers, entries and
// replies work again, a reply resent under its client_id is stored once,
// and every reply acknowledged before the cut is still there.
func TestReplicaDatabaseOutage(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs a server on PostgreSQL")
	}
	db := replicaDB(t)
	bin := trialogueBinary(t)
	studyPath := writeCrashStudy(t, t.TempDir())
	u, err := url.Parse(db)
	if err != nil {
		t.Fatal(err)
	}
	proxy := startDBProxy(t, u.Host)
	u.Host = proxy.addr
	p := startProc(t, bin, serveArgs(studyPath, u.String())...)
	// A request may wait for the store's connect timeout (10s), no longer:
	// the client's timeout is what tells an error from a hang.
	hc := noRedirects(16, 30*time.Second)
	defer hc.CloseIdleConnections()
	ready := func() (int, error) {
		res, err := hc.Get(p.base + "/readyz")
		if err != nil {
			return 0, err
		}
		res.Body.Close()
		return res.StatusCode, nil
	}
	if st, err := ready(); err != nil || st != 200 {
		t.Fatalf("/readyz before the cut: got %d %v, want 200", st, err)
	}

	// Respondents enter and chat; the chat arms' first two replies are
	// acknowledged before the cut.
	type respondent struct {
		rid, lean, token, kind string
		acked                  []string // client ids answered with 200
		sent                   []string // client ids sent, answered or not
	}
	var resp, chats []*respondent
	for i := range 12 {
		r := &respondent{rid: fmt.Sprintf("out-%02d", i), lean: []string{"left", "centre", "right"}[i%3]}
		st, token, err := enterAt(hc, p.base, r.rid, r.lean)
		if err != nil || st != http.StatusSeeOther {
			t.Fatalf("%s: entry got %d %v, want 303", r.rid, st, err)
		}
		r.token = token
		var a crashAnswer
		if st, err := crashPost(context.Background(), hc, p.base+"/c/"+token+"/resume", "", &a); err != nil || st != 200 {
			t.Fatalf("%s: resume got %d %v, want 200", r.rid, st, err)
		}
		r.kind = a.State.Kind
		resp = append(resp, r)
		if r.kind != arms.KindChat {
			continue
		}
		chats = append(chats, r)
		for _, id := range []string{"c0", "c1"} {
			r.sent = append(r.sent, id)
			if st, err := replyAt(hc, p.base, token, id); err != nil || st != 200 {
				t.Fatalf("%s: reply %s got %d %v, want 200", r.rid, id, st, err)
			}
			r.acked = append(r.acked, id)
		}
	}
	if len(chats) < 2 {
		t.Fatalf("chat respondents: got %d, want at least 2", len(chats))
	}

	// Half the chat respondents have a reply in flight when the database
	// goes; it ends either way, answered or with an error.
	var wg sync.WaitGroup
	inFlight := make([]int, len(chats))
	for i, r := range chats {
		r.sent = append(r.sent, "c2")
		if i%2 == 0 {
			wg.Go(func() {
				st, err := replyAt(hc, p.base, r.token, "c2")
				if err != nil {
					t.Errorf("%s: reply in flight at the cut: %v, want an answer", r.rid, err)
				}
				inFlight[i] = st
			})
		}
	}
	time.Sleep(50 * time.Millisecond) // within the scripted answer's 150ms
	proxy.cut()
	wg.Wait()
	for i, r := range chats {
		if i%2 == 0 {
			switch st := inFlight[i]; {
			case st == 200:
				r.acked = append(r.acked, "c2")
			case st < 500:
				t.Errorf("%s: reply in flight at the cut: got %d, want 200 or an error status", r.rid, st)
			}
		}
	}
	t.Logf("replies in flight at the cut answered: %v", inFlight)

	t.Run("ErrWhileCut", func(t *testing.T) {
		if st, err := ready(); err != nil || st == 200 {
			t.Errorf("/readyz: got %d %v, want an answer other than 200", st, err)
		}
		if st, _, err := enterAt(hc, p.base, "out-new", "left"); err != nil || st < 500 {
			t.Errorf("entry: got %d %v, want an error status", st, err)
		}
		for i, r := range chats {
			if i%2 == 1 {
				if st, err := replyAt(hc, p.base, r.token, "c2"); err != nil || st < 500 {
					t.Errorf("%s: reply: got %d %v, want an error status", r.rid, st, err)
				}
			}
		}
	})

	proxy.restore(t)
	t.Run("OKRestored", func(t *testing.T) {
		restored := time.Now()
		deadline := restored.Add(30 * time.Second)
		for {
			st, err := ready()
			if err == nil && st == 200 {
				t.Logf("/readyz 200 again %v after the database came back", time.Since(restored).Round(time.Millisecond))
				break
			}
			if time.Now().After(deadline) {
				t.Fatalf("/readyz 30s after the database came back: got %d %v, want 200\n%s", st, err, p.stderr.String())
			}
			time.Sleep(50 * time.Millisecond)
		}
		st, token, err := enterAt(hc, p.base, "out-new", "left")
		if err != nil || st != http.StatusSeeOther {
			t.Fatalf("entry: got %d %v, want 303", st, err)
		}
		resp = append(resp, &respondent{rid: "out-new", token: token})
		for _, r := range chats {
			// the reply that failed or went unanswered, under its client id, then one more
			for _, id := range []string{"c2", "c3"} {
				if st, err := replyAt(hc, p.base, r.token, id); err != nil || st != 200 {
					t.Fatalf("%s: reply %s: got %d %v, want 200", r.rid, id, st, err)
				}
			}
			r.sent = append(r.sent, "c3")
		}
	})
	if t.Failed() {
		t.FailNow()
	}

	ctx := context.Background()
	st, err := store.Open(ctx, db, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	sessions, err := st.Sessions(ctx, "crash-ferry")
	if err != nil {
		t.Fatal(err)
	}
	if len(sessions) != len(resp) {
		t.Fatalf("sessions: got %d, want %d", len(sessions), len(resp))
	}
	byRID := map[string]store.Session{}
	for _, s := range sessions {
		byRID[s.RID] = s
	}
	acked := 0
	for _, r := range chats {
		s := byRID[r.rid]
		if s.Token != r.token {
			t.Fatalf("%s: stored session is not the one entered", r.rid)
		}
		turns, err := st.Turns(ctx, s.ID)
		if err != nil {
			t.Fatal(err)
		}
		stored := map[string]int{}
		for i, tn := range turns {
			if tn.Role == store.RoleRespondent {
				stored[tn.ClientID]++
				if i+1 >= len(turns) || turns[i+1].Role != store.RoleAssistant {
					t.Errorf("%s: reply %s has no stored answer after it", r.rid, tn.ClientID)
				}
			}
		}
		for _, id := range r.acked {
			acked++
			if stored[id] != 1 {
				t.Errorf("%s: reply %s, acknowledged before the cut, stored %d times, want 1", r.rid, id, stored[id])
			}
		}
		for _, id := range r.sent {
			if stored[id] != 1 {
				t.Errorf("%s: reply %s stored %d times, want 1", r.rid, id, stored[id])
			}
		}
		if len(stored) != len(r.sent) {
			t.Errorf("%s: got %d distinct replies stored, want the %d sent", r.rid, len(stored), len(r.sent))
		}
	}
	t.Logf("%d respondents, %d in chat arms, %d replies acknowledged before the cut, all stored once", len(resp), len(chats), acked)
}

// TestServeUnreachableDatabase: serve with a PostgreSQL URL it cannot use
// fails at start, with one line naming the cause, exit status 1, and
// nothing listening. No server is needed: the port is closed, or the URL
// is refused before any connection.
func TestServeUnreachableDatabase(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary")
	}
	bin := trialogueBinary(t)
	studyPath := writeCrashStudy(t, t.TempDir())
	closedPort := func() string {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		defer ln.Close()
		return ln.Addr().String()
	}
	serve := func(t *testing.T, db string) (addr string, code int, stdout, stderr string) {
		t.Helper()
		addr = closedPort()
		ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
		defer cancel()
		cmd := exec.CommandContext(ctx, bin, "serve", "--study", studyPath, "--db", db, "--addr", addr)
		var o, e bytes.Buffer
		cmd.Stdout, cmd.Stderr = &o, &e
		err := cmd.Run()
		var ee *exec.ExitError
		switch {
		case err == nil:
		case errors.As(err, &ee):
			code = ee.ExitCode()
		default:
			t.Fatal(err)
		}
		return addr, code, o.String(), e.String()
	}
	check := func(t *testing.T, addr string, code int, stdout, stderr string, want ...string) {
		t.Helper()
		if code != exitFail {
			t.Errorf("exit status: got %d, want 1", code)
		}
		if lines := strings.Split(strings.TrimSpace(stderr), "\n"); len(lines) != 1 {
			t.Errorf("stderr: got %d lines, want 1:\n%s", len(lines), stderr)
		}
		for _, w := range want {
			if !strings.Contains(stderr, w) {
				t.Errorf("stderr: got %q, want it to say %q", stderr, w)
			}
		}
		if servingLine.MatchString(stdout) || strings.Contains(stderr, "msg=serving") {
			t.Errorf("got a serving line, want none:\n%s%s", stdout, stderr)
		}
		if c, err := net.DialTimeout("tcp", addr, 5*time.Second); err == nil {
			c.Close()
			t.Errorf("%s after the exit: got a connection, want it refused", addr)
		}
	}
	t.Run("ErrRefused", func(t *testing.T) {
		dbAddr := closedPort()
		addr, code, stdout, stderr := serve(t, "postgres://trialogue@"+dbAddr+"/x?sslmode=disable")
		check(t, addr, code, stdout, stderr, dbAddr, "refused")
	})
	t.Run("ErrNoDatabaseName", func(t *testing.T) {
		addr, code, stdout, stderr := serve(t, "postgres://trialogue@"+closedPort())
		check(t, addr, code, stdout, stderr, "names no database")
	})
}
