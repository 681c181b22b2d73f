// Package migrations holds Trialogue's SQL schema changes, embedded in the
// binary and applied in order at start. A shipped migration is never edited:
// a change of schema is a new numbered file.
package migrations

import "embed"

// FS holds the numbered migration files.
//
//go:embed *.sql
var FS embed.FS
