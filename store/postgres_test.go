package store_test

import (
	"context"
	"net"
	"net/url"
	"strings"
	"testing"
	"time"

	"trialogue/store"
	"trialogue/store/pgtest"
)

// TestPostgresOpenErrors: each way a PostgreSQL --db can be wrong gives one
// line that says what failed and where, and opens nothing.
func TestPostgresOpenErrors(t *testing.T) {
	server := pgtest.Server(t)
	u, err := url.Parse(server)
	if err != nil {
		t.Fatal(err)
	}
	with := func(f func(u *url.URL)) string {
		c := *u
		f(&c)
		return c.String()
	}
	// A port nobody listens on: bind one, note it, close it.
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	closed := l.Addr().String()
	l.Close()
	cases := []struct {
		name, dsn string
		want      []string // all in the one-line message
	}{
		{"ErrNoDatabaseName", with(func(u *url.URL) { u.Path = "" }), []string{"names no database", u.Host}},
		{"ErrUnknownDatabase", with(func(u *url.URL) { u.Path = "/no_such_trialogue_db" }), []string{"no_such_trialogue_db", "does not exist"}},
		{"ErrUnreachable", with(func(u *url.URL) { u.Host = closed; u.RawQuery = "" }), []string{closed, "refused"}}, // TLS first, then plain: two attempts
		{"ErrBadURL", "postgres://[::1", []string{"does not parse"}},
	}
	if _, ok := u.User.Password(); ok {
		cases = append(cases, struct {
			name, dsn string
			want      []string
		}{"ErrWrongPassword", with(func(u *url.URL) { u.User = url.UserPassword(u.User.Username(), "not-the-password") }), []string{"password authentication failed", u.Host}})
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			ctx, cancel := context.WithTimeout(context.Background(), 20*time.Second)
			defer cancel()
			st, err := store.Open(ctx, c.dsn, store.Options{})
			if err == nil {
				st.Close()
				t.Fatal("opened; want an error")
			}
			msg := err.Error()
			t.Log(msg)
			if strings.Contains(msg, "\n") {
				t.Errorf("error spans lines: %q", msg)
			}
			for _, w := range c.want {
				if !strings.Contains(msg, w) {
					t.Errorf("error %q does not say %q", msg, w)
				}
			}
			if strings.Contains(msg, "not-the-password") {
				t.Errorf("error %q shows the password", msg)
			}
		})
	}
	t.Run("ErrSynchronousIsSQLites", func(t *testing.T) {
		if _, err := store.Open(context.Background(), pgtest.Schema(t), store.Options{Synchronous: "NORMAL"}); err == nil || !strings.Contains(err.Error(), "SQLite") {
			t.Fatalf("got %v, want an error saying --synchronous is SQLite's", err)
		}
	})
	t.Run("ErrSchemaNewerThanBinary", func(t *testing.T) {
		dsn := pgtest.Schema(t)
		st, err := store.Open(context.Background(), dsn, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		st.Close()
		pgtest.Exec(t, dsn, `INSERT INTO goose_db_version (version_id, is_applied) VALUES (9999, true)`)
		_, err = store.Open(context.Background(), dsn, store.Options{})
		if err == nil || !strings.Contains(err.Error(), "newer than this binary") {
			t.Fatalf("got %v, want the schema refused as newer", err)
		}
	})
}

// TestPostgresConnectionsLost: when the server drops every connection of
// the store (as a restart or a failover does), the writes in the way may
// fail, Ready tells, and the store then carries on by itself with nothing
// committed lost.
func TestPostgresConnectionsLost(t *testing.T) {
	dsn := pgtest.Database(t)
	ctx := context.Background()
	st, err := store.Open(ctx, dsn, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	def, src := mustStudy(t)
	sv, err := st.RegisterStudy(ctx, def, src)
	if err != nil {
		t.Fatal(err)
	}
	as := assigner(t, def, sv)
	before, _, err := st.Enter(ctx, sv, "lean=left", respondent("kept-1", "left"), as)
	if err != nil {
		t.Fatal(err)
	}
	u, _ := url.Parse(dsn)
	pgtest.Exec(t, pgtest.Server(t), `SELECT pg_terminate_backend(pid) FROM pg_stat_activity WHERE datname = '`+strings.TrimPrefix(u.Path, "/")+`' AND pid <> pg_backend_pid()`)
	// The pools find their connections dead and open new ones; a statement
	// caught on a dead connection fails at most once per connection.
	var after store.Session
	for try := 0; ; try++ {
		after, _, err = st.Enter(ctx, sv, "lean=left", respondent("kept-2", "left"), as)
		if err == nil {
			break
		}
		if try == 10 {
			t.Fatalf("the store did not recover: %v", err)
		}
		t.Logf("entry %d after the connections were dropped: %v", try, err)
	}
	if err := st.Ready(ctx); err != nil {
		t.Fatalf("ready after recovery: %v", err)
	}
	for _, want := range []store.Session{before, after} {
		got, err := st.SessionByRID(ctx, def.ID, want.RID)
		if err != nil || got.ID != want.ID || got.Slot != want.Slot {
			t.Fatalf("session %s: got %+v, %v; want %+v", want.RID, got, err, want)
		}
	}
	if after.Slot != before.Slot+1 {
		t.Fatalf("slots %d then %d: want consecutive", before.Slot, after.Slot)
	}
}
