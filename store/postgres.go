package store

import (
	"context"
	"database/sql"
	"errors"
	"fmt"
	"net/url"
	"slices"
	"strings"
	"time"

	"github.com/jackc/pgx/v5"
	"github.com/jackc/pgx/v5/stdlib"
)

// How many connections a store opens to PostgreSQL, at most: a replica
// needs MaxWriteConns+MaxReadConns of the server's max_connections.
const (
	MaxWriteConns = 4
	MaxReadConns  = 8
)

// openPostgres opens a PostgreSQL database through pgx's database/sql
// adapter. Every replica of a server opens the same URL.
func openPostgres(ctx context.Context, dsn string, opt Options) (*Store, error) {
	name := redact(dsn)
	if opt.Synchronous != "" {
		return nil, fmt.Errorf("open database %s: --synchronous is SQLite's setting; PostgreSQL takes synchronous_commit from its server", name)
	}
	cfg, err := pgx.ParseConfig(dsn)
	if err != nil {
		if inner := errors.Unwrap(err); inner != nil {
			err = inner // the URL is named once, password masked, below
		}
		return nil, fmt.Errorf("open database %s: %w", name, err)
	}
	if u, err := url.Parse(dsn); err == nil && (u.Path == "" || u.Path == "/") && u.Query().Get("dbname") == "" {
		return nil, fmt.Errorf("open database %s: the URL names no database; add it as the path, such as postgres://user@%s/trialogue", name, u.Host)
	}
	if cfg.ConnectTimeout == 0 {
		cfg.ConnectTimeout = 10 * time.Second
	}
	// At most 12 connections per replica (PostgreSQL's default
	// max_connections is 100): writers, one transaction per study written at
	// once and goose's lock; readers, for pages and state.
	w := stdlib.OpenDB(*cfg)
	w.SetMaxOpenConns(MaxWriteConns)
	w.SetMaxIdleConns(MaxWriteConns)
	r := stdlib.OpenDB(*cfg.Copy())
	r.SetMaxOpenConns(MaxReadConns)
	r.SetMaxIdleConns(MaxReadConns)
	// Connections are renewed now and then, so that a restarted or failed
	// over server is found again.
	for _, db := range []*sql.DB{w, r} {
		db.SetConnMaxLifetime(30 * time.Minute)
		db.SetConnMaxIdleTime(5 * time.Minute)
	}
	s, err := start(ctx, &Store{w: w, r: r, path: name, d: dialects[Postgres], rb: &rebinder{}, Now: time.Now}, name)
	if err != nil {
		return nil, oneLine(err)
	}
	return s, nil
}

// oneLine puts pgx's report of a failed connection, which lists every
// address and attempt on a line of its own (often the same line twice,
// once with TLS and once without), on one line.
func oneLine(err error) error {
	msg := err.Error()
	if !strings.Contains(msg, "\n") {
		return err
	}
	var parts []string
	for _, l := range strings.Split(msg, "\n") {
		if l = strings.TrimSpace(l); l != "" && !slices.Contains(parts, l) {
			parts = append(parts, l)
		}
	}
	return &lineError{msg: strings.Join(parts, " "), err: err}
}

type lineError struct {
	msg string
	err error
}

func (e *lineError) Error() string { return e.msg }
func (e *lineError) Unwrap() error { return e.err }

// redact is a PostgreSQL URL fit for messages and logs: its password is
// masked.
func redact(dsn string) string {
	u, err := url.Parse(dsn)
	if err != nil {
		return "(a PostgreSQL URL that does not parse)"
	}
	return u.Redacted()
}
