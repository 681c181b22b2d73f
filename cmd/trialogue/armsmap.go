package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"

	"trialogue/arms/analysis/textmap"
)

const armsMapUsage = `usage: trialogue arms-map --db PATH --study ID [--permutations N] [--seed N] [--out DIR]`

// runArmsMap shows whether the arms' model messages differ in content.
func runArmsMap(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue arms-map", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() { fmt.Fprintln(stderr, armsMapUsage); fs.PrintDefaults() }
	db := fs.String("db", "trialogue.db", dbUsage)
	id := fs.String("study", "", "study `id`")
	perms := fs.Int("permutations", 1000, "label permutations for the classification p-value (0 skips them)")
	seed := fs.Uint64("seed", 1, "`seed` of the folds, permutations and randomized SVD")
	out := fs.String("out", "", "`folder` for armsmap.svg and the armsmap-*.csv files")
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	if *id == "" || fs.NArg() > 0 {
		fmt.Fprintln(stderr, armsMapUsage)
		return exitUsage
	}
	st, code := openDB(ctx, *db, stderr)
	if code != exitOK {
		return code
	}
	defer st.Close()
	d, code := readDesign(ctx, st, *db, *id, stderr)
	if code != exitOK {
		return code
	}
	docs, sessions, err := st.MapDocs(ctx, *id)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	res, err := textmap.Build(docs, d.Study.ArmOrder, textmap.Options{Permutations: *perms, Seed: *seed})
	if err != nil {
		fmt.Fprintf(stderr, "trialogue arms-map: %v\n", err)
		return exitUsage
	}
	if err := textmap.WriteText(stdout, res); err != nil {
		fmt.Fprintf(stderr, "trialogue arms-map: %v\n", err)
		return exitFail
	}
	if *out == "" {
		return exitOK
	}
	if err := os.MkdirAll(*out, 0o755); err != nil {
		fmt.Fprintf(stderr, "trialogue arms-map: %v\n", err)
		return exitFail
	}
	if err := textmap.WriteFiles(folderCreate(*out), res, sessions); err != nil {
		fmt.Fprintf(stderr, "trialogue arms-map: %v\n", err)
		return exitFail
	}
	fmt.Fprintf(stdout, "\nWrote armsmap.svg and armsmap-points.csv, -distances.csv, -terms.csv, -summary.csv to %s\n", *out)
	return exitOK
}
