package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"

	"trialogue/arms"
	"trialogue/store"
)

const exportUsage = `usage: trialogue export --db PATH --study ID --out DIR [--include-pilot] [--include-synthetic] [--release]`

// runExport writes a study's data for analysis: sessions.csv, turns.csv,
// turns.jsonl and codebook.md.
func runExport(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue export", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() { fmt.Fprintln(stderr, exportUsage); fs.PrintDefaults() }
	db := fs.String("db", "", dbUsage)
	id := fs.String("study", "", "study `id`")
	out := fs.String("out", "", "`folder` to write the files into (created if needed; files of an earlier export are replaced)")
	pilot := fs.Bool("include-pilot", false, "include the sessions marked pilot")
	synthetic := fs.Bool("include-synthetic", false, "include the sessions of synthetic respondents (trialogue simulate)")
	release := fs.Bool("release", false, "a shareable copy: respondent ids replaced by a keyed hash, personal details in text masked")
	if ok, code := parseFlags(fs, args); !ok {
		return code
	}
	if *db == "" || *id == "" || *out == "" || fs.NArg() != 0 {
		fmt.Fprintln(stderr, exportUsage)
		return exitUsage
	}
	st, code := openDB(ctx, *db, stderr)
	if st == nil {
		return code
	}
	defer st.Close()
	sv, err := st.Study(ctx, *id)
	if errors.Is(err, store.ErrNotFound) {
		fmt.Fprintf(stderr, "trialogue: study %q is not in %s; nothing was written\n", *id, *db)
		return exitUsage
	}
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	canon, err := st.StudyCanonical(ctx, *id, sv.Version)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	def, err := arms.FromCanonical(canon)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	sum, err := st.Export(ctx, def, *id, *out, store.ExportOptions{IncludePilot: *pilot, IncludeSynthetic: *synthetic, Release: *release})
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	left := ""
	if sum.Pilot > 0 || sum.Synthetic > 0 {
		left = fmt.Sprintf(" (left out: %d pilot and %d synthetic sessions)", sum.Pilot, sum.Synthetic)
	}
	fmt.Fprintf(stdout, "Wrote %s: %d sessions and %d turns%s, described in %s.\n", *out, sum.Sessions, sum.Turns, left, store.ExportCodebook)
	if *release {
		fmt.Fprintf(stdout, "Release copy: respondent ids hashed, %d personal details masked.\n", sum.Masks)
	}
	return exitOK
}
