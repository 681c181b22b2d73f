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

// openDB opens an existing database for a command. A missing file is a
// usage error (most likely a mistyped path, and opening would create an
// empty database); a file that cannot be opened is a failure.
func openDB(ctx context.Context, path string, stderr io.Writer) (*store.Store, int) {
	if _, err := os.Stat(path); err != nil {
		fmt.Fprintf(stderr, "trialogue: database %s: %v\n", path, err)
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
