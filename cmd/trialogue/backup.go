package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"

	"trialogue/store"
)

// runBackup writes a consistent copy of a database, also while a server is
// serving it.
//
//	trialogue backup --db PATH --out FILE
func runBackup(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue backup", flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "trialogue.db", "SQLite database `file` to copy (PostgreSQL: use pg_dump)")
	out := fs.String("out", "", "new `file` to write the copy to (must not exist)")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	if fs.NArg() > 0 || *out == "" {
		fmt.Fprintln(stderr, "usage: trialogue backup --db PATH --out FILE")
		return exitUsage
	}
	if store.EngineOf(*db) == store.Postgres {
		fmt.Fprintln(stderr, "trialogue: backup copies a SQLite file; back up a PostgreSQL database with pg_dump (README: Several replicas on PostgreSQL)")
		return exitUsage
	}
	size, err := store.Backup(ctx, *db, *out)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	fmt.Fprintf(stdout, "backup of %s written to %s (%d bytes, integrity check ok)\n", *db, *out, size)
	return exitOK
}
