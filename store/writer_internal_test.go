package store

import (
	"context"
	"errors"
	"os"
	"path/filepath"
	"testing"
	"time"

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
