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

// A job is one public write: its statements run inside a savepoint of a
// shared transaction, so that its failure undoes only its own changes.
type job struct {
	ctx context.Context
	fn  func(ctx context.Context, tx *Tx) error
	err chan error
}

// writer runs every write of the store on one connection, grouping the
// writes that arrive together into one transaction and one commit. With
// synchronous=FULL a commit costs a disk flush; many respondents replying at
// once share it, while each caller still returns only after its own write is
// durable.
type writer struct {
	db   *sql.DB
	st   *stmts
	jobs chan *job // unbuffered: a job handed over is a job the writer will run
	quit chan struct{}
	wg   sync.WaitGroup
	once sync.Once
}

func newWriter(db *sql.DB) *writer {
	w := &writer{db: db, st: newStmts(db), jobs: make(chan *job), quit: make(chan struct{})}
	w.wg.Add(1)
	go w.loop()
	return w
}

// do runs fn in the next batch and waits until that batch is committed. It
// waits even if ctx ends meanwhile, so that a caller never reports failure
// for a write that was in fact committed.
func (w *writer) do(ctx context.Context, fn func(ctx context.Context, tx *Tx) error) error {
	j := &job{ctx: ctx, fn: fn, err: make(chan error, 1)}
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
		w.run(batch)
	}
}

// run executes a batch in one transaction. Statements run with a context
// that is never canceled: interrupting SQLite mid-statement can roll back the
// whole transaction, and with it other callers' writes.
func (w *writer) run(batch []*job) {
	errs := make([]error, len(batch))
	fail := func(err error) {
		for _, j := range batch {
			j.err <- err
		}
	}
	ctx := context.Background()
	sqltx, err := w.db.BeginTx(ctx, nil)
	if err != nil {
		fail(fmt.Errorf("begin: %w", err))
		return
	}
	tx := &Tx{tx: sqltx, c: w.st}
	for i, j := range batch {
		if err := j.ctx.Err(); err != nil {
			errs[i] = err
			continue
		}
		if _, err := tx.ExecContext(ctx, "SAVEPOINT job"); err != nil {
			errs[i] = fmt.Errorf("savepoint: %w", err)
			continue
		}
		errs[i] = runJob(j, tx)
		if errs[i] != nil {
			if _, err := tx.ExecContext(ctx, "ROLLBACK TO job"); err != nil {
				sqltx.Rollback()
				fail(fmt.Errorf("undo a failed write: %w (after %w)", err, errs[i]))
				return
			}
		}
		if _, err := tx.ExecContext(ctx, "RELEASE job"); err != nil {
			sqltx.Rollback()
			fail(fmt.Errorf("release savepoint: %w", err))
			return
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
