package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"sync"
)

// ErrClosed means the store was closed before the write could run.
var ErrClosed = errors.New("store is closed")

// maxBatch bounds how many writes share one commit.
const maxBatch = 128

// retries is how often a write that met another replica's transaction in a
// deadlock is run again before its error is returned.
const retries = 3

// A job is one public write: its statements run inside a savepoint of a
// shared transaction, so that its failure undoes only its own changes.
type job struct {
	ctx   context.Context
	study string // the study it writes, or "" for none (accounts, logins)
	fn    func(ctx context.Context, tx *Tx) error
	err   chan error
}

// writer runs every write of the store, grouping the writes that arrive
// together into one transaction and one commit: a commit costs a disk flush,
// and many respondents replying at once share it, while each caller still
// returns only after its own write is durable.
//
// On SQLite one goroutine runs every batch on one connection. On PostgreSQL
// a batch is split by study: each study's writes share a transaction that
// first takes the study's lock (dialect.lockStudy), so that the chain's next
// record and a stratum's next slot are read and written by one replica at a
// time, and the studies' transactions run side by side. A transaction
// holding one study's lock never waits for another's, so replicas cannot
// deadlock on them.
type writer struct {
	db   *sql.DB
	d    *dialect
	st   *stmts
	jobs chan *job // unbuffered: a job handed over is a job the writer will run
	quit chan struct{}
	wg   sync.WaitGroup
	once sync.Once
}

func newWriter(db *sql.DB, d *dialect, rb *rebinder) *writer {
	w := &writer{db: db, d: d, st: newStmts(db, d, rb), jobs: make(chan *job), quit: make(chan struct{})}
	w.wg.Add(1)
	go w.loop()
	return w
}

// do runs fn, a write of study (or of no study: ""), in the next batch and
// waits until that batch is committed. It waits even if ctx ends meanwhile,
// so that a caller never reports failure for a write that was in fact
// committed.
func (w *writer) do(ctx context.Context, study string, fn func(ctx context.Context, tx *Tx) error) error {
	j := &job{ctx: ctx, study: study, fn: fn, err: make(chan error, 1)}
	select {
	case w.jobs <- j:
	case <-w.quit:
		return ErrClosed
	case <-ctx.Done():
		return ctx.Err()
	}
	return <-j.err
}

func (w *writer) close() {
	w.once.Do(func() { close(w.quit) })
	w.wg.Wait()
	w.st.close()
}

func (w *writer) loop() {
	defer w.wg.Done()
	for {
		var first *job
		select {
		case first = <-w.jobs:
		case <-w.quit:
			return
		}
		batch := []*job{first}
	gather:
		for len(batch) < maxBatch {
			select {
			case j := <-w.jobs:
				batch = append(batch, j)
			default:
				break gather
			}
		}
		if w.d.lockStudy == "" {
			w.run(batch)
			continue
		}
		var order []string
		groups := map[string][]*job{}
		for _, j := range batch {
			if _, ok := groups[j.study]; !ok {
				order = append(order, j.study)
			}
			groups[j.study] = append(groups[j.study], j)
		}
		if len(order) == 1 {
			w.run(batch)
			continue
		}
		var wg sync.WaitGroup
		for _, study := range order {
			wg.Go(func() { w.run(groups[study]) })
		}
		wg.Wait()
	}
}

// begin starts a write transaction; for a study's writes on PostgreSQL it
// first takes the study's lock, outside any savepoint, so that it is held
// to the commit whatever job fails.
func (w *writer) begin(ctx context.Context, study string) (*Tx, error) {
	sqltx, err := w.db.BeginTx(ctx, nil)
	if err != nil {
		return nil, fmt.Errorf("begin: %w", err)
	}
	tx := &Tx{tx: sqltx, c: w.st, d: w.d}
	if w.d.lockStudy != "" && study != "" {
		if _, err := tx.ExecContext(ctx, w.d.lockStudy, study); err != nil {
			sqltx.Rollback()
			return nil, fmt.Errorf("lock study %q: %w", study, err)
		}
	}
	return tx, nil
}

// runOne runs a job that arrived alone in its own transaction: its failure
// undoes the whole transaction, so it needs no savepoint (two round trips
// less to PostgreSQL).
func (w *writer) runOne(j *job) {
	if err := j.ctx.Err(); err != nil {
		j.err <- err
		return
	}
	for try := 0; ; try++ {
		err := w.alone(j)
		if err == nil || !isRetryable(err) || try == retries {
			j.err <- err
			return
		}
	}
}

func (w *writer) alone(j *job) error {
	ctx := context.Background()
	tx, err := w.begin(ctx, j.study)
	if err != nil {
		return err
	}
	if err := runJob(j, tx); err != nil {
		tx.tx.Rollback()
		return err
	}
	if err := tx.tx.Commit(); err != nil {
		return fmt.Errorf("commit: %w", err)
	}
	return nil
}

// run executes a batch in one transaction, each job in a savepoint.
// Statements run with a context that is never canceled: interrupting
// SQLite mid-statement can roll back the whole transaction, and with it
// other callers' writes.
func (w *writer) run(batch []*job) {
	if len(batch) == 1 {
		w.runOne(batch[0])
		return
	}
	errs := make([]error, len(batch))
	fail := func(err error) {
		for _, j := range batch {
			j.err <- err
		}
	}
	ctx := context.Background()
	tx, err := w.begin(ctx, batch[0].study)
	if err != nil {
		fail(err)
		return
	}
	sqltx := tx.tx
	for i, j := range batch {
		if err := j.ctx.Err(); err != nil {
			errs[i] = err
			continue
		}
		for try := 0; ; try++ {
			if _, err := tx.ExecContext(ctx, "SAVEPOINT job"); err != nil {
				sqltx.Rollback()
				fail(fmt.Errorf("savepoint: %w", err))
				return
			}
			errs[i] = runJob(j, tx)
			if errs[i] != nil {
				tx.heads = nil // the job's chain records are undone with it
				if _, err := tx.ExecContext(ctx, "ROLLBACK TO SAVEPOINT job"); err != nil {
					sqltx.Rollback()
					fail(fmt.Errorf("undo a failed write: %w (after %w)", err, errs[i]))
					return
				}
			}
			if _, err := tx.ExecContext(ctx, "RELEASE SAVEPOINT job"); err != nil {
				sqltx.Rollback()
				fail(fmt.Errorf("release savepoint: %w", err))
				return
			}
			if errs[i] == nil || !isRetryable(errs[i]) || try == retries {
				break
			}
		}
	}
	if err := sqltx.Commit(); err != nil {
		for i := range errs {
			if errs[i] == nil {
				errs[i] = fmt.Errorf("commit: %w", err)
			}
		}
	}
	for i, j := range batch {
		j.err <- errs[i]
	}
}

// runJob runs one job, turning a panic into its error so that one faulty
// write cannot stop the writer, which every other write waits on; its
// savepoint is then rolled back like any failed job's.
func runJob(j *job, tx *Tx) (err error) {
	defer func() {
		if v := recover(); v != nil {
			err = fmt.Errorf("write panicked: %v", v)
		}
	}()
	return j.fn(context.WithoutCancel(j.ctx), tx)
}
