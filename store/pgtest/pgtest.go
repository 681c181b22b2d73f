// Package pgtest gives tests a fresh PostgreSQL database or schema on the
// server that TRIALOGUE_TEST_POSTGRES names (a postgres:// URL of a role
// that may create databases). Without it the tests that need PostgreSQL
// skip, unless TRIALOGUE_REQUIRE_POSTGRES is set, as CI sets it: then they
// fail.
package pgtest

import (
	"context"
	"database/sql"
	"net/url"
	"os"
	"strings"
	"testing"
	"time"

	"github.com/google/uuid"
	_ "github.com/jackc/pgx/v5/stdlib" // the "pgx" driver
)

// Server returns the test server's URL, or skips (or fails, when required).
func Server(tb testing.TB) string {
	tb.Helper()
	u := os.Getenv("TRIALOGUE_TEST_POSTGRES")
	if u == "" {
		if os.Getenv("TRIALOGUE_REQUIRE_POSTGRES") != "" {
			tb.Fatal("TRIALOGUE_REQUIRE_POSTGRES is set but TRIALOGUE_TEST_POSTGRES names no PostgreSQL server")
		}
		tb.Skip("TRIALOGUE_TEST_POSTGRES is not set: no PostgreSQL server to test against")
	}
	return u
}

// Database creates an empty database for the test and returns its URL; it
// is dropped when the test ends.
func Database(tb testing.TB) string {
	tb.Helper()
	server := Server(tb)
	name := "trialogue_test_" + strings.ReplaceAll(uuid.NewString(), "-", "")[:16]
	exec(tb, server, `CREATE DATABASE `+name)
	tb.Cleanup(func() { exec(tb, server, `DROP DATABASE IF EXISTS `+name+` WITH (FORCE)`) })
	return withPath(tb, server, "/"+name, nil)
}

// Schema creates an empty schema in the server's database for the test and
// returns a URL whose connections use it (search_path); it is dropped when
// the test ends. Cheaper than a database, for the many store tests.
func Schema(tb testing.TB) string {
	tb.Helper()
	server := Server(tb)
	name := "t_" + strings.ReplaceAll(uuid.NewString(), "-", "")[:16]
	exec(tb, server, `CREATE SCHEMA `+name)
	tb.Cleanup(func() { exec(tb, server, `DROP SCHEMA IF EXISTS `+name+` CASCADE`) })
	return withPath(tb, server, "", map[string]string{"search_path": name})
}

func withPath(tb testing.TB, server, path string, query map[string]string) string {
	tb.Helper()
	u, err := url.Parse(server)
	if err != nil {
		tb.Fatalf("TRIALOGUE_TEST_POSTGRES: %v", err)
	}
	if path != "" {
		u.Path = path
	}
	q := u.Query()
	for k, v := range query {
		q.Set(k, v)
	}
	u.RawQuery = q.Encode()
	return u.String()
}

func exec(tb testing.TB, server, stmt string) {
	tb.Helper()
	db, err := sql.Open("pgx", server)
	if err != nil {
		tb.Fatalf("postgres: %v", err)
	}
	defer db.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if _, err := db.ExecContext(ctx, stmt); err != nil {
		tb.Fatalf("postgres: %s: %v", stmt, err)
	}
}

// Exec runs statements on a test database, for tests that change stored
// rows behind the store's back.
func Exec(tb testing.TB, dsn string, stmts ...string) {
	tb.Helper()
	for _, s := range stmts {
		exec(tb, dsn, s)
	}
}
