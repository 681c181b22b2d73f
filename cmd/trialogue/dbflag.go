package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"

	"trialogue/store"
)

// dbUsage is how every command's --db flag describes itself.
const dbUsage = "database: a SQLite `file`, or a postgres:// URL"

// dbExists reports whether --db names a database that is there: a SQLite
// file must exist (a mistyped path would otherwise create an empty
// database); a PostgreSQL URL is checked by connecting to it.
func dbExists(path string, stderr io.Writer) bool {
	if store.EngineOf(path) == store.Postgres {
		return true
	}
	if _, err := os.Stat(path); err != nil {
		fmt.Fprintf(stderr, "trialogue: database %s: %v\n", path, err)
		return false
	}
	return true
}

// openDB opens an existing database for a command. A missing file is a
// usage error; a database that cannot be opened is a failure.
func openDB(ctx context.Context, path string, stderr io.Writer) (*store.Store, int) {
	if !dbExists(path, stderr) {
		return nil, exitUsage
	}
	st, err := store.Open(ctx, path, store.Options{})
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return nil, exitFail
	}
	return st, exitOK
}

// parseFlags parses a command's flags: ok false means stop with code
// (0 after -h, 2 after a bad flag, whose message the flag set has printed).
func parseFlags(fs *flag.FlagSet, args []string) (ok bool, code int) {
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return false, exitOK
		}
		return false, exitUsage
	}
	return true, exitOK
}
