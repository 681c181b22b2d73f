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
	"time"

	"github.com/pressly/goose/v3"
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

// Store is a Trialogue database: one SQLite file in WAL mode.
type Store struct {
	w  *sql.DB // the single writer connection: BEGIN IMMEDIATE, so writers queue instead of deadlocking
	r  *sql.DB // readers, which WAL lets run beside the writer
	rs *stmts  // the readers' prepared statements
	wr *writer // groups concurrent writes into shared commits

	path string

	// Now is the clock, a seam for tests.
	Now func() time.Time
}

// Path is the database file.
func (s *Store) Path() string { return s.path }

// Options tune how the database is opened.
type Options struct {
	// Synchronous is SQLite's synchronous pragma: FULL (default) makes every
	// commit durable across a power loss; NORMAL is faster and still safe
	// against a crash of the process.
	Synchronous string
}

// Open opens (creating if needed) the database at path and applies pending
// migrations.
func Open(ctx context.Context, path string, opt Options) (*Store, error) {
	if path == "" {
		return nil, errors.New("open database: no path given")
	}
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
	s := &Store{w: w, r: r, path: path, Now: time.Now}
	if err := w.PingContext(ctx); err != nil {
		s.Close()
		return nil, fmt.Errorf("open database %q: %w", path, err)
	}
	if err := s.migrate(ctx); err != nil {
		s.Close()
		return nil, fmt.Errorf("open database %q: %w", path, err)
	}
	s.wr = newWriter(w)
	s.rs = newStmts(r)
	return s, nil
}

func (s *Store) migrate(ctx context.Context) error {
	p, err := goose.NewProvider(goose.DialectSQLite3, s.w, migrations.FS,
		goose.WithLogger(goose.NopLogger()))
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
	p, err := goose.NewProvider(goose.DialectSQLite3, s.r, migrations.FS, goose.WithLogger(goose.NopLogger()))
	if err != nil {
		return fmt.Errorf("ready: %w", err)
	}
	pending, err := p.HasPending(ctx)
	if err != nil {
		return fmt.Errorf("ready: %w", err)
	}
	if pending {
		return errors.New("ready: migrations are pending")
	}
	return nil
}

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
