// Package migrations holds Trialogue's SQL schema changes, embedded in the
// binary and applied in order at start: one folder per database engine,
// with the same numbered steps in each. A shipped migration is never
// edited: a change of schema is a new numbered file in both folders.
package migrations

import (
	"embed"
	"io/fs"
)

//go:embed sqlite/*.sql postgres/*.sql
var all embed.FS

// SQLite holds the numbered migration files for SQLite.
var SQLite = sub("sqlite")

// Postgres holds the numbered migration files for PostgreSQL.
var Postgres = sub("postgres")

func sub(dir string) fs.FS {
	f, err := fs.Sub(all, dir)
	if err != nil {
		panic(err) // the folder is embedded above: cannot happen
	}
	return f
}
