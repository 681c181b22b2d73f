package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"trialogue/arms"
	"trialogue/arms/analysis/textmap"
	"trialogue/store"
)

const armsMapUsage = `usage: trialogue arms-map --db PATH --study ID [--permutations N] [--seed N] [--out DIR]`

// runArmsMap shows whether the arms' model messages differ in content.
func runArmsMap(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue arms-map", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() { fmt.Fprintln(stderr, armsMapUsage); fs.PrintDefaults() }
	db := fs.String("db", "trialogue.db", "SQLite database `file`")
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
	if _, err := os.Stat(*db); err != nil {
		fmt.Fprintf(stderr, "trialogue: database %s: %v\n", *db, err)
		return exitUsage
	}
	st, err := store.Open(ctx, *db, store.Options{})
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	defer st.Close()
	sv, err := st.Study(ctx, *id)
	if errors.Is(err, store.ErrNotFound) {
		fmt.Fprintf(stderr, "trialogue: study %q is not in %s\n", *id, *db)
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
	study, err := arms.FromCanonical(canon)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	msgs, err := st.ModelMessages(ctx, *id)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	docs := make([]textmap.Doc, len(msgs))
	sessions := make([]int64, len(msgs))
	for i, m := range msgs {
		docs[i] = textmap.Doc{Arm: m.Arm, Text: m.Text}
		sessions[i] = m.SessionID
	}
	res, err := textmap.Build(docs, study.ArmOrder, textmap.Options{Permutations: *perms, Seed: *seed})
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
	create := func(name string) (io.WriteCloser, error) {
		f, err := os.Create(filepath.Join(*out, name))
		if err != nil {
			return nil, fmt.Errorf("create %s: %w", name, err)
		}
		return f, nil
	}
	err = textmap.WriteCSV(create, res, sessions)
	if err == nil {
		var f io.WriteCloser
		if f, err = create("armsmap.svg"); err == nil {
			err = errors.Join(textmap.WriteSVG(f, res), f.Close())
		}
	}
	if err != nil {
		fmt.Fprintf(stderr, "trialogue arms-map: %v\n", err)
		return exitFail
	}
	fmt.Fprintf(stdout, "\nWrote armsmap.svg and armsmap-points.csv, -distances.csv, -terms.csv, -summary.csv to %s\n", *out)
	return exitOK
}
