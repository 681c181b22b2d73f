// Package store is Trialogue's persistence: every SQL statement, the
// transactions, and the schema migrations applied at start. It imports only
// the experiment's types from arms.
package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"runtime"
	"sync/atomic"
	"time"

	"github.com/pressly/goose/v3"
	"github.com/pressly/goose/v3/lock"
	_ "modernc.org/sqlite" // the "sqlite" driver

	"trialogue/migrations"
)

// TimeFormat is how every time is stored: UTC, to the millisecond.
const TimeFormat = "2006-01-02T15:04:05.000Z"

// Sentinel errors, checked with errors.Is.
var (
	// ErrNotFound means no row matched: an unknown study, token or session.
	ErrNotFound = errors.New("not found")
	// ErrConflict means another request changed the same thing first.
	ErrConflict = errors.New("conflict")
)

// Store is a Trialogue database: one SQLite file in WAL mode, or a
// PostgreSQL database that several server replicas may share.
type Store struct {
	w  *sql.DB   // writers: on SQLite the single writer connection, BEGIN IMMEDIATE, so writers queue instead of deadlocking
	r  *sql.DB   // readers, which WAL (SQLite) or MVCC (PostgreSQL) lets run beside the writers
	rs *stmts    // the readers' statements
	wr *writer   // groups concurrent writes into shared commits
	d  *dialect  // where the engines' SQL differs
	rb *rebinder // placeholders rewritten for PostgreSQL

	path string // the SQLite file, or the PostgreSQL URL without its password

	entryRetries atomic.Int64 // entries that met a unique constraint and ran again

	ready *goose.Provider // reads the schema version for Ready, made once at open

	// Now is the clock, a seam for tests.
	Now func() time.Time
}

// Path is the database: the SQLite file, or the PostgreSQL URL with its
// password masked.
func (s *Store) Path() string { return s.path }

// Engine is the database engine behind the store.
func (s *Store) Engine() Engine { return s.d.engine }

// Options tune how the database is opened.
type Options struct {
	// Synchronous is SQLite's synchronous pragma: FULL (default) makes every
	// commit durable across a power loss; NORMAL is faster and still safe
	// against a crash of the process. PostgreSQL takes its own setting
	// (synchronous_commit) from the server.
	Synchronous string
}

// Open opens the database dsn names, creating a SQLite file if needed, and
// applies pending migrations. A postgres:// or postgresql:// URL opens a
// PostgreSQL database (EngineOf); anything else is a SQLite file path.
func Open(ctx context.Context, dsn string, opt Options) (*Store, error) {
	if dsn == "" {
		return nil, errors.New("open database: no path given")
	}
	if EngineOf(dsn) == Postgres {
		return openPostgres(ctx, dsn, opt)
	}
	return openSQLite(ctx, dsn, opt)
}

func openSQLite(ctx context.Context, path string, opt Options) (*Store, error) {
	if opt.Synchronous == "" {
		opt.Synchronous = "FULL"
	}
	switch opt.Synchronous {
	case "FULL", "NORMAL", "EXTRA":
	default:
		return nil, fmt.Errorf("open database: synchronous must be FULL, NORMAL or EXTRA, not %q", opt.Synchronous)
	}
	dsn := func(lock string) string {
		return "file:" + path + "?_pragma=busy_timeout(10000)&_pragma=journal_mode(WAL)&_pragma=synchronous(" +
			opt.Synchronous + ")&_pragma=foreign_keys(1)&_txlock=" + lock
	}
	w, err := sql.Open("sqlite", dsn("immediate"))
	if err != nil {
		return nil, fmt.Errorf("open database %q: %w", path, err)
	}
	// One connection writes (the writer goroutine); a second one only prepares
	// statements, which a transaction holding the first cannot do.
	w.SetMaxOpenConns(2)
	r, err := sql.Open("sqlite", dsn("deferred"))
	if err != nil {
		w.Close()
		return nil, fmt.Errorf("open database %q: %w", path, err)
	}
	r.SetMaxOpenConns(max(4, runtime.NumCPU()*2))
	return start(ctx, &Store{w: w, r: r, path: path, d: dialects[SQLite], rb: &rebinder{}, Now: time.Now}, fmt.Sprintf("%q", path))
}

// start checks the connection, migrates and starts the writer.
func start(ctx context.Context, s *Store, name string) (*Store, error) {
	if err := s.w.PingContext(ctx); err != nil {
		s.Close()
		return nil, fmt.Errorf("open database %s: %w", name, err)
	}
	if err := s.migrate(ctx); err != nil {
		s.Close()
		return nil, fmt.Errorf("open database %s: %w", name, err)
	}
	var err error
	if s.ready, err = s.provider(s.r, false); err != nil {
		s.Close()
		return nil, fmt.Errorf("open database %s: %w", name, err)
	}
	s.wr = newWriter(s.w, s.d, s.rb)
	s.rs = newStmts(s.r, s.d, s.rb)
	return s, nil
}

// provider is goose on db; migrating (not only reading the version) takes
// PostgreSQL's migration lock.
func (s *Store) provider(db *sql.DB, migrating bool) (*goose.Provider, error) {
	if s.d.engine == Postgres && migrating {
		// Replicas starting together take turns: goose holds an advisory lock
		// while it migrates.
		locker, err := lock.NewPostgresSessionLocker()
		if err != nil {
			return nil, err
		}
		return goose.NewProvider(goose.DialectPostgres, db, migrations.Postgres,
			goose.WithLogger(goose.NopLogger()), goose.WithSessionLocker(locker))
	}
	if s.d.engine == Postgres {
		return goose.NewProvider(goose.DialectPostgres, db, migrations.Postgres, goose.WithLogger(goose.NopLogger()))
	}
	return goose.NewProvider(goose.DialectSQLite3, db, migrations.SQLite, goose.WithLogger(goose.NopLogger()))
}

func (s *Store) migrate(ctx context.Context) error {
	p, err := s.provider(s.w, true)
	if err != nil {
		return fmt.Errorf("migrations: %w", err)
	}
	current, err := p.GetDBVersion(ctx)
	if err != nil {
		return fmt.Errorf("migrations: %w", err)
	}
	sources := p.ListSources()
	if n := len(sources); n > 0 && current > sources[n-1].Version {
		return fmt.Errorf("the database schema is at version %d, newer than this binary knows (%d): use a newer trialogue", current, sources[n-1].Version)
	}
	res, err := p.Up(ctx)
	if err != nil {
		return fmt.Errorf("migrations: %w", err)
	}
	for _, m := range res {
		slog.Debug("migration applied", slog.Int64("version", m.Source.Version), slog.Duration("took", m.Duration))
	}
	return nil
}

// Ready reports whether the database answers and its schema is current.
func (s *Store) Ready(ctx context.Context) error {
	pending, err := s.ready.HasPending(ctx)
	if err != nil {
		return fmt.Errorf("ready: %w", err)
	}
	if pending {
		return errors.New("ready: migrations are pending")
	}
	return nil
}

// sql is query with its placeholders as the store's engine wants them, for
// statements put together at run time.
func (s *Store) sql(query string) string { return s.rb.sql(s.d, query) }

// Close waits for writes under way and closes the database. Writes after
// Close fail with ErrClosed.
func (s *Store) Close() error {
	if s.wr != nil {
		s.wr.close()
	}
	if s.rs != nil {
		s.rs.close()
	}
	return errors.Join(s.w.Close(), s.r.Close())
}

// now returns the current time in UTC, truncated to what is stored.
func (s *Store) now() time.Time { return s.Now().UTC().Truncate(time.Millisecond) }

func fmtTime(t time.Time) string { return t.UTC().Format(TimeFormat) }

func parseTime(v string) (time.Time, error) {
	t, err := time.Parse(TimeFormat, v)
	if err != nil {
		return time.Time{}, fmt.Errorf("stored time %q: %w", v, err)
	}
	return t, nil
}

var _ io.Closer = (*Store)(nil)
