package store

import (
	"context"
	"database/sql"
	"errors"
	"slices"
	"sync"
)

// stmts runs the store's statements on one pool. On SQLite it prepares each
// query once and keeps it: parsing SQL was a fifth of the time of a reply
// before. On PostgreSQL it rewrites the placeholders and lets pgx keep its
// own per-connection cache of prepared statements.
type stmts struct {
	db *sql.DB
	d  *dialect
	rb *rebinder
	mu sync.Mutex
	m  map[string]*sql.Stmt
}

func newStmts(db *sql.DB, d *dialect, rb *rebinder) *stmts {
	return &stmts{db: db, d: d, rb: rb, m: map[string]*sql.Stmt{}}
}

// prepared reports whether the pool's statements are prepared here.
func (c *stmts) prepared() bool { return c.d.engine == SQLite }

func (c *stmts) get(ctx context.Context, query string) (*sql.Stmt, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if st, ok := c.m[query]; ok {
		return st, nil
	}
	st, err := c.db.PrepareContext(ctx, query)
	if err != nil {
		return nil, err
	}
	c.m[query] = st
	return st, nil
}

// QueryContext runs a query.
func (c *stmts) QueryContext(ctx context.Context, query string, args ...any) (*sql.Rows, error) {
	if !c.prepared() {
		return c.db.QueryContext(ctx, c.rb.sql(c.d, query), pgArgs(args)...)
	}
	st, err := c.get(ctx, query)
	if err != nil {
		return nil, err
	}
	return st.QueryContext(ctx, args...)
}

// QueryRowContext runs a query for one row.
func (c *stmts) QueryRowContext(ctx context.Context, query string, args ...any) *sql.Row {
	if !c.prepared() {
		return c.db.QueryRowContext(ctx, c.rb.sql(c.d, query), pgArgs(args)...)
	}
	st, err := c.get(ctx, query)
	if err != nil {
		return c.db.QueryRowContext(ctx, query, args...) // reports the same error through Scan
	}
	return st.QueryRowContext(ctx, args...)
}

func (c *stmts) close() error {
	c.mu.Lock()
	defer c.mu.Unlock()
	var errs []error
	for _, st := range c.m {
		errs = append(errs, st.Close())
	}
	c.m = map[string]*sql.Stmt{}
	return errors.Join(errs...)
}

// Tx is a write transaction whose statements come from the writer's cache.
type Tx struct {
	tx    *sql.Tx
	c     *stmts
	d     *dialect
	heads map[string]chainHead // chain heads this transaction wrote (appendChain)
}

// QueryContext runs a query inside the transaction.
func (t *Tx) QueryContext(ctx context.Context, query string, args ...any) (*sql.Rows, error) {
	if !t.c.prepared() {
		return t.tx.QueryContext(ctx, t.c.rb.sql(t.d, query), pgArgs(args)...)
	}
	st, err := t.c.get(ctx, query)
	if err != nil {
		return nil, err
	}
	return t.tx.StmtContext(ctx, st).QueryContext(ctx, args...)
}

// QueryRowContext runs a query for one row inside the transaction.
func (t *Tx) QueryRowContext(ctx context.Context, query string, args ...any) *sql.Row {
	if !t.c.prepared() {
		return t.tx.QueryRowContext(ctx, t.c.rb.sql(t.d, query), pgArgs(args)...)
	}
	st, err := t.c.get(ctx, query)
	if err != nil {
		return t.tx.QueryRowContext(ctx, query, args...)
	}
	return t.tx.StmtContext(ctx, st).QueryRowContext(ctx, args...)
}

// ExecContext runs a statement inside the transaction.
func (t *Tx) ExecContext(ctx context.Context, query string, args ...any) (sql.Result, error) {
	if !t.c.prepared() {
		return t.tx.ExecContext(ctx, t.c.rb.sql(t.d, query), pgArgs(args)...)
	}
	st, err := t.c.get(ctx, query)
	if err != nil {
		return nil, err
	}
	return t.tx.StmtContext(ctx, st).ExecContext(ctx, args...)
}

// readTx is a read transaction: all its queries see one snapshot of the
// database, even while respondents write.
type readTx struct {
	tx *sql.Tx
	c  *stmts
}

// readTx begins a read transaction on the readers' pool. SQLite's WAL gives
// a deferred transaction one snapshot; PostgreSQL needs REPEATABLE READ for
// that (its default, READ COMMITTED, takes one per statement).
func (s *Store) readTx(ctx context.Context) (*readTx, error) {
	opt := &sql.TxOptions{ReadOnly: true}
	if s.d.engine == Postgres {
		opt.Isolation = sql.LevelRepeatableRead
	}
	tx, err := s.r.BeginTx(ctx, opt)
	if err != nil {
		return nil, err
	}
	return &readTx{tx: tx, c: s.rs}, nil
}

func (r *readTx) QueryContext(ctx context.Context, query string, args ...any) (*sql.Rows, error) {
	return r.tx.QueryContext(ctx, r.c.rb.sql(r.c.d, query), r.c.args(args)...)
}

func (r *readTx) QueryRowContext(ctx context.Context, query string, args ...any) *sql.Row {
	return r.tx.QueryRowContext(ctx, r.c.rb.sql(r.c.d, query), r.c.args(args)...)
}

func (r *readTx) Rollback() error { return r.tx.Rollback() }

// pgArgs adapts arguments to PostgreSQL: the schema keeps flags as INTEGER
// 0 or 1 in both engines, and SQLite's driver turns a Go bool into one,
// while pgx will not put a bool in an integer column.
func pgArgs(args []any) []any {
	copied := false
	for i, a := range args {
		if b, ok := a.(bool); ok {
			if !copied { // the caller's slice stays as it was
				args, copied = slices.Clone(args), true
			}
			args[i] = boolInt(b)
		}
	}
	return args
}

func (c *stmts) args(args []any) []any {
	if c.d.engine == Postgres {
		return pgArgs(args)
	}
	return args
}
