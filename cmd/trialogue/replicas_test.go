package main

import (
	"context"
	"errors"
	"fmt"
	"io"
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
	"trialogue/arms/assign"
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

	ctx := context.Background()
	st, err := store.Open(ctx, db, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	def, _, err := arms.ParseFile(studyPath)
	if err != nil {
		t.Fatal(err)
	}
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
	complete := 0
	for k, b := range blocks {
		if b.used != b.size {
			continue
		}
		complete++
		for _, r := range def.Scheme().Arms {
			// The ratio is 1:1:1, so each arm fills a third of a block.
			if want := b.size * r.Weight / 3; b.arms[r.Arm] != want {
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

	errs := make([]error, n)
	for i, r := range resp {
		wg.Go(func() { errs[i] = resumeAfterCrash(b.base, hc, r) })
	}
	wg.Wait()
	for i, err := range errs {
		if err != nil {
			t.Errorf("%s through replica B: %v", resp[i].rid, err)
		}
	}
	if t.Failed() {
		t.FailNow()
	}
	hc.CloseIdleConnections()
	b.cmd.Process.Signal(syscall.SIGTERM)
	<-b.exited
	if b.err != nil {
		t.Fatalf("replica B on SIGTERM: got %v, want exit 0\n%s", b.err, b.stderr.String())
	}
	checkCrashDatabase(t, db, studyPath, resp)
}
