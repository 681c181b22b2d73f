package store_test

import (
	"bytes"
	"context"
	"errors"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/store"
	"trialogue/store/pgtest"
)

// The store's tests are its contract, and they run on both engines: as
// they are, on SQLite files, and again in TestOnPostgres, which runs this
// test binary once more with TRIALOGUE_STORE_ENGINE=postgres, so that
// mustOpen gives each test a fresh PostgreSQL schema instead.
var onPostgres = os.Getenv("TRIALOGUE_STORE_ENGINE") == "postgres"

// pgPaths maps the file paths the tests choose to PostgreSQL schemas, so
// that a test reopening "its file" reopens its schema.
var pgPaths sync.Map

// pgDSN maps a store's Path (its URL, password masked) back to the URL.
var pgDSN sync.Map

// mustOpen opens a store on a file in the test's temporary folder (or, on
// PostgreSQL, a fresh schema standing for that file).
func mustOpen(tb testing.TB, path string) *store.Store {
	tb.Helper()
	if path == "" {
		path = filepath.Join(tb.TempDir(), "t.db")
	}
	dsn := path
	opt := store.Options{Synchronous: os.Getenv("TRIALOGUE_BENCH_SYNCHRONOUS")}
	if onPostgres {
		v, ok := pgPaths.Load(path)
		if !ok {
			v, _ = pgPaths.LoadOrStore(path, pgtest.Schema(tb))
		}
		dsn, opt = v.(string), store.Options{}
	}
	st, err := store.Open(context.Background(), dsn, opt)
	if onPostgres {
		pgDSN.Store(st.Path(), dsn)
	}
	if err != nil {
		tb.Fatalf("open store: %v", err)
	}
	tb.Cleanup(func() { st.Close() })
	return st
}

// sqliteOnly skips a test of the PostgreSQL run that reaches into the
// SQLite file itself (tampering with it, backing it up): the contract it
// checks is the file's.
func sqliteOnly(tb testing.TB) {
	tb.Helper()
	if onPostgres {
		tb.Skip("reaches into the SQLite file")
	}
}

// TestOnPostgres runs every test of this package again on PostgreSQL: the
// same test functions, each on its own schema of the server that
// TRIALOGUE_TEST_POSTGRES names (the TestPostgres ones are PostgreSQL's
// own and ran already).
func TestOnPostgres(t *testing.T) {
	if onPostgres {
		t.Skip("this is the PostgreSQL run")
	}
	pgtest.Server(t) // skips, or fails when PostgreSQL is required
	args := []string{"-test.count=1", "-test.timeout=15m", "-test.skip=^(TestOnPostgres|TestPostgres.*)$", "-test.v"}
	if testing.Short() {
		args = append(args, "-test.short")
	}
	cmd := exec.Command(os.Args[0], args...)
	cmd.Env = append(os.Environ(), "TRIALOGUE_STORE_ENGINE=postgres")
	out, err := cmd.CombinedOutput()
	var passed, skipped []string
	for _, line := range strings.Split(string(out), "\n") {
		line = strings.TrimSpace(line)
		switch {
		case strings.HasPrefix(line, "--- PASS: Test"):
			passed = append(passed, strings.Fields(line)[2])
		case strings.HasPrefix(line, "--- SKIP: Test"):
			skipped = append(skipped, strings.Fields(line)[2])
		}
	}
	if err != nil {
		t.Fatalf("the store's tests on PostgreSQL failed: %v\n%s", err, out)
	}
	if len(passed) == 0 {
		t.Fatalf("the PostgreSQL run passed no test:\n%s", out)
	}
	t.Logf("on PostgreSQL: %d tests passed; skipped (SQLite file only): %s", len(passed), strings.Join(skipped, ", "))
}

func mustStudy(tb testing.TB) (*arms.Study, []byte) {
	tb.Helper()
	def, src, err := arms.ParseFile("../testdata/demo-study.yaml")
	if err != nil {
		tb.Fatalf("parse demo study: %v", err)
	}
	return def, src
}

func assigner(tb testing.TB, def *arms.Study, sv store.StudyVersion) store.Assigner {
	plan, err := assign.NewPlan(sv.Seed, def.Scheme())
	if err != nil {
		tb.Fatalf("plan: %v", err)
	}
	return func(stratum string, slot int) (string, string) {
		arm := plan.Slot(stratum, slot).Arm
		return arm, def.Arms[arm].Code
	}
}

// mustDemo opens a store with the demo study registered, and its assigner.
func mustDemo(tb testing.TB) (*store.Store, *arms.Study, store.StudyVersion, store.Assigner) {
	tb.Helper()
	st := mustOpen(tb, "")
	def, src := mustStudy(tb)
	sv, err := st.RegisterStudy(context.Background(), def, src)
	if err != nil {
		tb.Fatal(err)
	}
	return st, def, sv, assigner(tb, def, sv)
}

func respondent(rid, lean string) arms.Respondent {
	return arms.Respondent{RID: rid, Covariates: map[string]string{"age": "30", "lean": lean, "stance": "favour"}}
}

func TestRegisterStudy(t *testing.T) {
	ctx := context.Background()
	st := mustOpen(t, "")
	def, src := mustStudy(t)
	t.Run("OK", func(t *testing.T) {
		a, err := st.RegisterStudy(ctx, def, src)
		if err != nil {
			t.Fatal(err)
		}
		if a.Version != 1 || len(a.Secret) != 32 || len(a.Seed) != 32 {
			t.Fatalf("got version %d, secret %d bytes, seed %d bytes; want 1, 32, 32", a.Version, len(a.Secret), len(a.Seed))
		}
		b, err := st.RegisterStudy(ctx, def, src)
		if err != nil {
			t.Fatal(err)
		}
		if b.Version != 1 || string(b.Seed) != string(a.Seed) {
			t.Fatalf("same file again: got version %d, want 1 with the same seed", b.Version)
		}
	})
	t.Run("OKChangedFileIsNewVersion", func(t *testing.T) {
		changed := *def
		changed.Title = "Quillhaven gorge cable car, second wording"
		v, err := st.RegisterStudy(ctx, &changed, src)
		if err != nil {
			t.Fatal(err)
		}
		if v.Version != 2 {
			t.Fatalf("got version %d, want 2", v.Version)
		}
		cur, err := st.Study(ctx, def.ID)
		if err != nil {
			t.Fatal(err)
		}
		if cur.Version != 2 || cur.Hash != v.Hash {
			t.Fatalf("got current version %d, want 2", cur.Version)
		}
	})
	t.Run("ErrNotFound", func(t *testing.T) {
		if _, err := st.Study(ctx, "no-such-study"); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("got %v, want ErrNotFound", err)
		}
	})
}

func TestEnter(t *testing.T) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(t)
	a, created, err := st.Enter(ctx, sv, "lean=left", respondent("r1", "left"), as)
	if err != nil || !created {
		t.Fatalf("first entry: created %v, err %v", created, err)
	}
	if a.Slot != 0 || len(a.Token) < 22 {
		t.Fatalf("got slot %d token length %d, want slot 0 and a long token", a.Slot, len(a.Token))
	}
	t.Run("OKSameRIDSameSession", func(t *testing.T) {
		b, created, err := st.Enter(ctx, sv, "lean=left", respondent("r1", "left"), as)
		if err != nil || created {
			t.Fatalf("second entry: created %v, err %v", created, err)
		}
		if b.ID != a.ID || b.Token != a.Token || b.Arm != a.Arm {
			t.Fatalf("got session %d/%s, want %d/%s", b.ID, b.Arm, a.ID, a.Arm)
		}
	})
	t.Run("OKNextSlot", func(t *testing.T) {
		c, _, err := st.Enter(ctx, sv, "lean=left", respondent("r2", "left"), as)
		if err != nil {
			t.Fatal(err)
		}
		d, _, err := st.Enter(ctx, sv, "lean=right", respondent("r3", "right"), as)
		if err != nil {
			t.Fatal(err)
		}
		if c.Slot != 1 || d.Slot != 0 {
			t.Fatalf("got slots %d and %d, want 1 (lean=left) and 0 (lean=right)", c.Slot, d.Slot)
		}
	})
	t.Run("ErrUnknownToken", func(t *testing.T) {
		if _, err := st.SessionByToken(ctx, "no-such-token-at-all"); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("got %v, want ErrNotFound", err)
		}
	})
}

// TestEnterConcurrent: 64 entries at once never share or skip a slot, and
// each slot's arm is the one the plan gives.
func TestEnterConcurrent(t *testing.T) {
	ctx := context.Background()
	st, def, sv, as := mustDemo(t)
	const n = 64
	var wg sync.WaitGroup
	errs := make(chan error, n)
	for i := range n {
		wg.Add(1)
		go func() {
			defer wg.Done()
			lean := []string{"left", "centre", "right"}[i%3]
			_, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("c%02d", i), lean), as)
			errs <- err
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		if err != nil {
			t.Fatalf("concurrent entry: %v", err)
		}
	}
	sessions, err := st.Sessions(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if len(sessions) != n {
		t.Fatalf("got %d sessions, want %d", len(sessions), n)
	}
	slots := map[string][]bool{}
	for _, s := range sessions {
		if slots[s.Stratum] == nil {
			slots[s.Stratum] = make([]bool, n)
		}
		if slots[s.Stratum][s.Slot] {
			t.Fatalf("slot %d of %s taken twice", s.Slot, s.Stratum)
		}
		slots[s.Stratum][s.Slot] = true
		if want, _ := as(s.Stratum, s.Slot); s.Arm != want {
			t.Fatalf("session %d: got arm %s, want %s from the plan", s.ID, s.Arm, want)
		}
	}
	for stratum, taken := range slots {
		count := 0
		for _, ok := range taken {
			if ok {
				count++
			}
		}
		for i := range count {
			if !taken[i] {
				t.Fatalf("%s: slot %d skipped", stratum, i)
			}
		}
	}
}

func TestTurns(t *testing.T) {
	ctx := context.Background()
	path := filepath.Join(t.TempDir(), "t.db")
	st := mustOpen(t, path)
	def, src := mustStudy(t)
	sv, err := st.RegisterStudy(ctx, def, src)
	if err != nil {
		t.Fatal(err)
	}
	sess, _, err := st.Enter(ctx, sv, "lean=left", respondent("r1", "left"), assigner(t, def, sv))
	if err != nil {
		t.Fatal(err)
	}
	allow := func([]store.Turn, bool) error { return nil }
	r1, err := st.AddReply(ctx, sess, "first reply here", "c1", allow)
	if err != nil || r1.Existed || r1.Turn.Index != 0 || len(r1.Turns) != 1 {
		t.Fatalf("add reply: got %+v, %v", r1, err)
	}
	t.Run("OKSameClientIDOneTurn", func(t *testing.T) {
		again, err := st.AddReply(ctx, sess, "first reply here", "c1", allow)
		if err != nil || !again.Existed || again.Turn.Index != 0 || len(again.Turns) != 1 {
			t.Fatalf("resend: got %+v, %v; want the stored turn 0", again, err)
		}
	})
	t.Run("ErrRefusedByCheck", func(t *testing.T) {
		refuse := errors.New("refused")
		if _, err := st.AddReply(ctx, sess, "x", "c9", func([]store.Turn, bool) error { return refuse }); !errors.Is(err, refuse) {
			t.Fatalf("got %v, want the check's error", err)
		}
	})
	m, err := st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: 1, Text: "model answer", StartedAt: time.Now(),
		ModelRequested: "m", ModelReported: "m-1", Retries: 2, SystemSHA256: "s", RequestSHA256: "r", StudyHash: sess.StudyHash})
	if err != nil {
		t.Fatal(err)
	}
	t.Run("ErrConflictIndexTaken", func(t *testing.T) {
		_, err := st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: 1, Text: "second answer", StartedAt: time.Now(), StudyHash: sess.StudyHash})
		if !errors.Is(err, store.ErrConflict) {
			t.Fatalf("got %v, want ErrConflict", err)
		}
	})
	t.Run("ErrModelTurnOfUnknownSession", func(t *testing.T) {
		_, err := st.AddModelTurn(ctx, store.Turn{SessionID: 987654, Index: 0, Text: "an answer", StartedAt: time.Now(), StudyHash: sess.StudyHash})
		if !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("got %v, want ErrNotFound", err)
		}
	})
	t.Run("OKSurvivesReopen", func(t *testing.T) {
		if err := st.Close(); err != nil {
			t.Fatal(err)
		}
		st2 := mustOpen(t, path)
		turns, err := st2.Turns(ctx, sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		if len(turns) != 2 || turns[0].Text != "first reply here" || turns[1].Text != m.Text || turns[1].Retries != 2 || turns[1].ModelReported != "m-1" {
			t.Fatalf("after reopen got %+v", turns)
		}
		// FIPS 180-4 defines SHA-256; the stored text hash is that of the text.
		if turns[1].TextSHA256 == "" || turns[1].TextSHA256 == turns[0].TextSHA256 {
			t.Fatalf("text hashes missing or equal: %q %q", turns[0].TextSHA256, turns[1].TextSHA256)
		}
		again, err := st2.SessionByToken(ctx, sess.Token)
		if err != nil || again.Arm != sess.Arm || again.Slot != sess.Slot {
			t.Fatalf("session after reopen: %+v, %v", again, err)
		}
	})
}

func TestFinish(t *testing.T) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(t)
	sess, _, err := st.Enter(ctx, sv, "lean=left", respondent("r1", "left"), as)
	if err != nil {
		t.Fatal(err)
	}
	first, err := st.Finish(ctx, sess.ID)
	if err != nil {
		t.Fatal(err)
	}
	second, err := st.Finish(ctx, sess.ID)
	if err != nil || !second.Equal(first) {
		t.Fatalf("finish twice: got %v (%v), want the first time %v", second, err, first)
	}
	if _, err := st.Finish(ctx, 9999); !errors.Is(err, store.ErrNotFound) {
		t.Fatalf("finish unknown session: got %v, want ErrNotFound", err)
	}
}

func TestOpenErrors(t *testing.T) {
	ctx := context.Background()
	if _, err := store.Open(ctx, "", store.Options{}); err == nil {
		t.Fatal("empty path: got nil error")
	}
	if _, err := store.Open(ctx, filepath.Join(t.TempDir(), "t.db"), store.Options{Synchronous: "SOMETIMES"}); err == nil {
		t.Fatal("bad synchronous mode: got nil error")
	}
	if _, err := store.Open(ctx, filepath.Join(t.TempDir(), "missing-dir", "t.db"), store.Options{}); err == nil {
		t.Fatal("missing folder: got nil error")
	}
}

// BenchmarkEnterParallel measures assignments arriving from many
// respondents at once, which share commits.
func BenchmarkEnterParallel(b *testing.B) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(b)
	leans := []string{"left", "centre", "right"}
	var n atomic.Int64
	b.SetParallelism(32)
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			i := n.Add(1)
			lean := leans[i%3]
			if _, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("p%d", i), lean), as); err != nil {
				b.Error(err)
				return
			}
		}
	})
}

// BenchmarkEnter measures one assignment: a durable transaction that takes
// the next slot of a stratum and creates the session.
func BenchmarkEnter(b *testing.B) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(b)
	leans := []string{"left", "centre", "right"}
	b.ResetTimer()
	for i := 0; b.Loop(); i++ {
		lean := leans[i%3]
		if _, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("b%d", i), lean), as); err != nil {
			b.Fatal(err)
		}
	}
}

// TestWriterSurvivesPanic: a write that panics fails alone; the writes
// around it commit and the store keeps working.
func TestWriterSurvivesPanic(t *testing.T) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(t)
	sess, _, err := st.Enter(ctx, sv, "lean=left", respondent("p1", "left"), as)
	if err != nil {
		t.Fatal(err)
	}
	_, err = st.AddReply(ctx, sess, "this reply's check panics", "x1", func([]store.Turn, bool) error { panic("a bug in a check") })
	if err == nil || !strings.Contains(err.Error(), "panicked") {
		t.Fatalf("got %v, want the panic as an error", err)
	}
	if _, err := st.AddReply(ctx, sess, "a later reply", "x2", func([]store.Turn, bool) error { return nil }); err != nil {
		t.Fatalf("the store stopped working after a panic: %v", err)
	}
	turns, err := st.Turns(ctx, sess.ID)
	if err != nil || len(turns) != 1 || turns[0].Text != "a later reply" {
		t.Fatalf("got %+v (%v), want only the later reply", turns, err)
	}
}

// TestTwoStoresOneDatabase is two server replicas sharing a database: two
// stores on it take entries at once, some respondents entering through
// both at the same moment. Every rid gets one session, each stratum's
// slots are used in order without gaps or repeats, and the chain and the
// allocation audit hold.
func TestTwoStoresOneDatabase(t *testing.T) {
	ctx := context.Background()
	path := filepath.Join(t.TempDir(), "shared.db")
	a := mustOpen(t, path)
	b := mustOpen(t, path)
	def, src := mustStudy(t)
	var svs [2]store.StudyVersion
	var wg sync.WaitGroup
	for i, st := range []*store.Store{a, b} { // both replicas start at once
		wg.Go(func() {
			var err error
			if svs[i], err = st.RegisterStudy(ctx, def, src); err != nil {
				t.Errorf("register on replica %d: %v", i, err)
			}
		})
	}
	wg.Wait()
	if t.Failed() {
		return
	}
	if svs[0].Version != svs[1].Version || string(svs[0].Seed) != string(svs[1].Seed) {
		t.Fatalf("the replicas registered different studies: versions %d and %d", svs[0].Version, svs[1].Version)
	}
	as := assigner(t, def, svs[0])
	const n = 120
	var sessions sync.Map // rid → session id seen
	for i := range n {
		lean := []string{"left", "centre", "right"}[i%3]
		rid := fmt.Sprintf("twin-%03d", i)
		replicas := []*store.Store{[]*store.Store{a, b}[i%2]}
		if i%5 == 0 {
			replicas = []*store.Store{a, b} // the same rid through both at once
		}
		for _, st := range replicas {
			wg.Go(func() {
				sess, _, err := st.Enter(ctx, svs[0], "lean="+lean, respondent(rid, lean), as)
				if err != nil {
					t.Errorf("enter %s: %v", rid, err)
					return
				}
				if prev, loaded := sessions.LoadOrStore(rid, sess.ID); loaded && prev.(int64) != sess.ID {
					t.Errorf("rid %s got sessions %d and %d", rid, prev, sess.ID)
				}
			})
		}
	}
	wg.Wait()
	got, err := a.Sessions(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if len(got) != n {
		t.Fatalf("got %d sessions, want %d (one per rid)", len(got), n)
	}
	next := map[string]int{}
	for _, s := range got { // in order of entry
		if s.Slot != next[s.Stratum] {
			t.Fatalf("session %d: slot %d of %s, want %d (no gap, no repeat)", s.ID, s.Slot, s.Stratum, next[s.Stratum])
		}
		next[s.Stratum]++
	}
	d, err := b.LoadDataset(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if r := d.Check(); !r.OK() {
		t.Fatalf("the shared database does not verify: %+v", r)
	}
}

// replicas opens n stores on one database (one file, or one PostgreSQL
// schema in the engine's run) with the demo study registered, as n server
// replicas would.
func replicas(b *testing.B, n int) ([]*store.Store, store.StudyVersion, store.Assigner) {
	path := filepath.Join(b.TempDir(), "shared.db")
	def, src := mustStudy(b)
	var sts []*store.Store
	var sv store.StudyVersion
	for range n {
		st := mustOpen(b, path)
		var err error
		if sv, err = st.RegisterStudy(context.Background(), def, src); err != nil {
			b.Fatal(err)
		}
		sts = append(sts, st)
	}
	as := assigner(b, def, sv)
	// A study under way: 600 respondents have entered and replied twice
	// before the clock starts, and on PostgreSQL the statistics autovacuum
	// would have gathered by then (migration 00008), so that the planner
	// sees the tables as they are in fielding.
	allow := func([]store.Turn, bool) error { return nil }
	var wg sync.WaitGroup
	for w := range 32 {
		wg.Go(func() {
			for i := w; i < 600; i += 32 {
				st := sts[0]
				sess, _, err := st.Enter(context.Background(), sv, "lean=right", respondent(fmt.Sprintf("w%d", i), "right"), as)
				for k := 0; err == nil && k < 2; k++ {
					var a store.Added
					if a, err = st.AddReply(context.Background(), sess, "an earlier reply", fmt.Sprintf("c%d", k), allow); err == nil {
						_, err = st.AddModelTurn(context.Background(), store.Turn{SessionID: sess.ID, Index: a.Turn.Index + 1, Text: "an earlier answer",
							StartedAt: a.Turn.CreatedAt, StudyHash: sess.StudyHash})
					}
				}
				if err != nil {
					b.Error(err)
					return
				}
			}
		})
	}
	wg.Wait()
	if onPostgres {
		dsn, _ := pgDSN.Load(sts[0].Path())
		pgtest.Exec(b, dsn.(string), `ANALYZE`)
	}
	return sts, sv, as
}

// benchEnterReplicas measures assignments from 32 respondents at once,
// spread over n stores sharing one database.
func benchEnterReplicas(b *testing.B, n int) {
	ctx := context.Background()
	sts, sv, as := replicas(b, n)
	leans := []string{"left", "centre", "right"}
	var seq atomic.Int64
	b.SetParallelism(16) // 32 goroutines on 2 cores
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			i := seq.Add(1)
			lean := leans[i%3]
			if _, _, err := sts[int(i)%n].Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("r%d", i), lean), as); err != nil {
				b.Error(err)
				return
			}
		}
	})
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "assignments/s")
}

func BenchmarkEnterOneReplica(b *testing.B)  { benchEnterReplicas(b, 1) }
func BenchmarkEnterTwoReplicas(b *testing.B) { benchEnterReplicas(b, 2) }

// benchTurnsReplicas measures durable turns (a respondent's reply and the
// model's answer, each its own commit, as the server writes them) from 32
// respondents at once, spread over n stores sharing one database. Each
// respondent replies six times, then the next one enters (its entry is
// timed too, as in a study).
func benchTurnsReplicas(b *testing.B, n int) {
	ctx := context.Background()
	sts, sv, as := replicas(b, n)
	allow := func([]store.Turn, bool) error { return nil }
	var seq atomic.Int64
	b.SetParallelism(16)
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		var sess store.Session
		var st *store.Store
		for k := 0; pb.Next(); k++ {
			if k%6 == 0 {
				i := seq.Add(1)
				st = sts[int(i)%n]
				var err error
				if sess, _, err = st.Enter(ctx, sv, "lean=left", respondent(fmt.Sprintf("t%d", i), "left"), as); err != nil {
					b.Error(err)
					return
				}
			}
			a, err := st.AddReply(ctx, sess, "a reply about the cable car", fmt.Sprintf("c%d", k%6), allow)
			if err != nil {
				b.Error(err)
				return
			}
			if _, err := st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: a.Turn.Index + 1, Text: "an answer",
				StartedAt: a.Turn.CreatedAt, StudyHash: sess.StudyHash}); err != nil {
				b.Error(err)
				return
			}
		}
	})
	b.ReportMetric(2*float64(b.N)/b.Elapsed().Seconds(), "turns/s")
}

func BenchmarkTurnsOneReplica(b *testing.B)  { benchTurnsReplicas(b, 1) }
func BenchmarkTurnsTwoReplicas(b *testing.B) { benchTurnsReplicas(b, 2) }

// BenchmarkEnterFourStudiesTwoReplicas is BenchmarkEnterTwoReplicas with
// the respondents spread over four studies, whose writes take four locks
// instead of one: beside it, it shows what serializing a study's writes
// costs.
func BenchmarkEnterFourStudiesTwoReplicas(b *testing.B) {
	ctx := context.Background()
	sts, _, _ := replicas(b, 2)
	def, src := mustStudy(b)
	type study struct {
		sv store.StudyVersion
		as store.Assigner
	}
	var studies []study
	for k := range 4 {
		d := *def
		d.ID = fmt.Sprintf("%s-%d", def.ID, k)
		sv, err := sts[0].RegisterStudy(ctx, &d, bytes.Replace(src, []byte("id: "+def.ID), []byte("id: "+d.ID), 1))
		if err != nil {
			b.Fatal(err)
		}
		studies = append(studies, study{sv, assigner(b, &d, sv)})
	}
	leans := []string{"left", "centre", "right"}
	var seq atomic.Int64
	b.SetParallelism(16)
	b.ResetTimer()
	b.RunParallel(func(pb *testing.PB) {
		for pb.Next() {
			i := seq.Add(1)
			s, lean := studies[i%4], leans[i%3]
			if _, _, err := sts[int(i/4)%2].Enter(ctx, s.sv, "lean="+lean, respondent(fmt.Sprintf("f%d", i), lean), s.as); err != nil {
				b.Error(err)
				return
			}
		}
	})
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "assignments/s")
}
