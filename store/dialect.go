package store

import (
	"errors"
	"strconv"
	"strings"
	"sync"

	"github.com/jackc/pgx/v5/pgconn"
	"modernc.org/sqlite"
	sqlite3 "modernc.org/sqlite/lib"
)

// Engine names the database behind a store.
type Engine string

// The engines a store runs on.
const (
	SQLite   Engine = "sqlite"
	Postgres Engine = "postgres"
)

// EngineOf tells which engine a --db value names: a postgres:// or
// postgresql:// URL is PostgreSQL, anything else a SQLite file path.
func EngineOf(dsn string) Engine {
	if strings.HasPrefix(dsn, "postgres://") || strings.HasPrefix(dsn, "postgresql://") {
		return Postgres
	}
	return SQLite
}

// The store's SQL is written once, with ? placeholders and the SQL both
// engines share. Where the engines differ, the two forms stand side by side
// here, and the statements take the fragment from the store's dialect.
type dialect struct {
	engine Engine
	// like is a case-insensitive LIKE: SQLite's LIKE already folds ASCII
	// letters; PostgreSQL's ILIKE folds all letters.
	like string
	// idList is a condition "column is one of the ids in the JSON array
	// given as the one parameter".
	idList func(column string) string
	// lockStudy, when not empty, serializes a transaction with every other
	// transaction, on any replica, that writes the same study: its
	// parameter is the study id.
	lockStudy string
}

var dialects = map[Engine]*dialect{
	SQLite: {
		engine: SQLite,
		like:   "LIKE",
		idList: func(c string) string { return c + ` IN (SELECT value FROM json_each(?))` },
		// One writer connection with BEGIN IMMEDIATE serializes all writes.
		lockStudy: "",
	},
	Postgres: {
		engine: Postgres,
		like:   "ILIKE",
		idList: func(c string) string {
			return c + ` IN (SELECT value::bigint FROM jsonb_array_elements_text(?::jsonb))`
		},
		// A transaction-scoped advisory lock on the study's key, released at
		// commit or rollback (PostgreSQL manual, "Advisory Lock Functions").
		// The key is hashtextextended of a name no other lock uses.
		lockStudy: `SELECT pg_advisory_xact_lock(hashtextextended('trialogue/study/' || ?, 0))`,
	},
}

// rebind turns ? placeholders into PostgreSQL's $1, $2, ...; quoted text,
// quoted names and comments are left alone. The rewritten statements are
// kept, since the store runs the same few dozen statements again and again.
type rebinder struct{ m sync.Map }

func (r *rebinder) sql(d *dialect, query string) string {
	if d.engine != Postgres {
		return query
	}
	if q, ok := r.m.Load(query); ok {
		return q.(string)
	}
	q := rebind(query)
	r.m.Store(query, q)
	return q
}

func rebind(query string) string {
	var b strings.Builder
	b.Grow(len(query) + 16)
	n := 0
	for i := 0; i < len(query); i++ {
		c := query[i]
		switch {
		case c == '\'' || c == '"':
			j := i + 1
			for j < len(query) {
				if query[j] == c {
					if j+1 < len(query) && query[j+1] == c { // doubled quote inside
						j += 2
						continue
					}
					break
				}
				j++
			}
			b.WriteString(query[i:min(j+1, len(query))])
			i = j
		case c == '-' && i+1 < len(query) && query[i+1] == '-':
			j := strings.IndexByte(query[i:], '\n')
			if j < 0 {
				j = len(query) - i
			}
			b.WriteString(query[i : i+j])
			i += j - 1
		case c == '?':
			n++
			b.WriteByte('$')
			b.WriteString(strconv.Itoa(n))
		default:
			b.WriteByte(c)
		}
	}
	return b.String()
}

// isUnique reports whether err is a unique-constraint violation, in either
// engine.
func isUnique(err error) bool {
	var pe *pgconn.PgError
	if errors.As(err, &pe) {
		return pe.Code == "23505" // unique_violation (PostgreSQL manual, Appendix A)
	}
	var se *sqlite.Error
	if errors.As(err, &se) {
		return se.Code() == sqlite3.SQLITE_CONSTRAINT_UNIQUE || se.Code() == sqlite3.SQLITE_CONSTRAINT_PRIMARYKEY
	}
	return false
}

// isRetryable reports whether a transaction failed only because it met
// another one and may simply be run again: a deadlock or a serialization
// failure (PostgreSQL manual, Appendix A: 40P01, 40001).
func isRetryable(err error) bool {
	var pe *pgconn.PgError
	return errors.As(err, &pe) && (pe.Code == "40P01" || pe.Code == "40001")
}
