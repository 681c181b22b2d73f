package store

import (
	"context"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/store/pgtest"
)

// TestBatchUndoesAFailedJobsChainRecord: jobs of one batch share a
// transaction and the chain head it keeps; a job that appends a record and
// then fails takes its record back, and the next job links to the record
// before it, so the chain stays whole.
func TestBatchUndoesAFailedJobsChainRecord(t *testing.T) {
	ctx := context.Background()
	dsn := filepath.Join(t.TempDir(), "t.db")
	if os.Getenv("TRIALOGUE_STORE_ENGINE") == "postgres" {
		dsn = pgtest.Schema(t)
	}
	s, err := Open(ctx, dsn, Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	const study = "harrow-ferry"
	err = s.wr.do(ctx, study, func(ctx context.Context, tx *Tx) error {
		_, err := tx.ExecContext(ctx, `INSERT INTO studies (id, secret, seed, created_at) VALUES (?, ?, ?, ?)`, study, []byte("s"), []byte("s"), fmtTime(s.now()))
		return err
	})
	if err != nil {
		t.Fatal(err)
	}
	boom := errors.New("the job fails after its chain record")
	appendJob := func(name string, fail bool) *job {
		return &job{ctx: ctx, study: study, err: make(chan error, 1), fn: func(ctx context.Context, tx *Tx) error {
			if err := appendChain(ctx, tx, study, EventPhase, time.Now(), map[string]string{"job": name}); err != nil {
				return err
			}
			if fail {
				return boom
			}
			return nil
		}}
	}
	batch := []*job{appendJob("first", false), appendJob("second", true), appendJob("third", false)}
	s.wr.run(batch) // one transaction, as the writer runs jobs that arrive together
	for i, want := range []error{nil, boom, nil} {
		if err := <-batch[i].err; !errors.Is(err, want) {
			t.Fatalf("job %d: got %v, want %v", i, err, want)
		}
	}
	recs, err := s.Chain(ctx, study)
	if err != nil {
		t.Fatal(err)
	}
	if len(recs) != 2 || recs[0].Seq != 1 || recs[1].Seq != 2 || recs[1].Prev != recs[0].Hash {
		t.Fatalf("got chain %+v, want records 1 and 2 of the first and third job, linked", recs)
	}
	if b := VerifyChain(recs); b != nil {
		t.Fatalf("chain breaks: %v", b)
	}
}

// TestEnterRetriesOnUniqueConflict: the study lock is what keeps replicas
// from meeting, but the unique constraints stand behind it. With the lock
// taken away, two stores on one PostgreSQL database enter the same
// respondents at the same moment: each time one of them meets the other's
// session (or slot, or chain record), is undone and runs again, and finds
// the session made. Every rid still gets one session and every slot is
// used once. (SQLite's stores cannot meet: BEGIN IMMEDIATE serializes them.)
func TestEnterRetriesOnUniqueConflict(t *testing.T) {
	if os.Getenv("TRIALOGUE_STORE_ENGINE") != "postgres" {
		t.Skip("runs in the PostgreSQL run (TestOnPostgres): SQLite's writers never meet")
	}
	ctx := context.Background()
	dsn := pgtest.Schema(t)
	var stores [2]*Store
	for i := range stores {
		s, err := Open(ctx, dsn, Options{})
		if err != nil {
			t.Fatal(err)
		}
		defer s.Close()
		nolock := *s.d
		nolock.lockStudy = ""
		s.d, s.wr.d = &nolock, &nolock
		stores[i] = s
	}
	def, src, err := arms.ParseFile("../testdata/demo-study.yaml")
	if err != nil {
		t.Fatal(err)
	}
	sv, err := stores[0].RegisterStudy(ctx, def, src)
	if err != nil {
		t.Fatal(err)
	}
	assign := func(stratum string, slot int) (string, string) { return "debate", "D" }
	const n = 40
	for i := range n {
		r := arms.Respondent{RID: fmt.Sprintf("twin-%02d", i), Covariates: map[string]string{"lean": "left"}}
		var got [2]Session
		var errs [2]error
		var wg sync.WaitGroup
		for k, s := range stores {
			wg.Go(func() { got[k], _, errs[k] = s.Enter(ctx, sv, "lean=left", r, assign) })
		}
		wg.Wait()
		if errs[0] != nil || errs[1] != nil || got[0].ID != got[1].ID {
			t.Fatalf("%s: got sessions %d (%v) and %d (%v), want one", r.RID, got[0].ID, errs[0], got[1].ID, errs[1])
		}
	}
	retries := stores[0].entryRetries.Load() + stores[1].entryRetries.Load()
	t.Logf("%d of %d simultaneous pairs met a unique constraint and ran again", retries, n)
	if retries == 0 {
		t.Fatal("no entry met a unique constraint: the test did not reach the retry")
	}
	sessions, err := stores[1].Sessions(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if len(sessions) != n {
		t.Fatalf("got %d sessions, want %d", len(sessions), n)
	}
	for i, s := range sessions {
		if s.Slot != i {
			t.Fatalf("session %d has slot %d, want %d: no slot repeated or skipped", s.ID, s.Slot, i)
		}
	}
	recs, err := stores[0].Chain(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if b := VerifyChain(recs); b != nil {
		t.Fatalf("chain: %v", b)
	}
}
