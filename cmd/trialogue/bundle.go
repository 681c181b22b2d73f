package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"

	"trialogue/store"
)

// runBundle writes a study's replication bundle:
// trialogue bundle --db PATH --study ID --out FILE.tar.gz [--release].
func runBundle(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue bundle", flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "", dbUsage)
	study := fs.String("study", "", "study `id`")
	out := fs.String("out", "", "bundle `file` to write (.tar.gz)")
	release := fs.Bool("release", false, "a shareable copy: respondent ids removed, personal details in text masked")
	if ok, code := parseFlags(fs, args); !ok {
		return code
	}
	if *db == "" || *study == "" || *out == "" || fs.NArg() != 0 {
		fmt.Fprintln(stderr, "usage: trialogue bundle --db PATH --study ID --out FILE.tar.gz [--release]")
		return exitUsage
	}
	st, code := openDB(ctx, *db, stderr)
	if st == nil {
		return code
	}
	defer st.Close()
	if _, err := st.Phase(ctx, *study); err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitUsage
	}
	// Write beside the target and rename, so a failed run leaves no half bundle.
	tmp, err := os.CreateTemp(filepath.Dir(*out), ".bundle-*")
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	defer os.Remove(tmp.Name())
	m, err := st.WriteBundle(ctx, *study, tmp, *release)
	if err == nil {
		err = tmp.Sync()
	}
	if cerr := tmp.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(tmp.Name(), *out)
	}
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: bundle: %v\n", err)
		return exitFail
	}
	seal := "the allocation seed is included"
	if m.Sealed {
		seal = "the allocation seed is sealed until the study is closed (trialogue close)"
	}
	fmt.Fprintf(stdout, "Wrote %s: %d files; chain head %s (record %d); %s.\n", *out, len(m.Files)+1, m.Head.Hash, m.Head.Seq, seal)
	return exitOK
}

// runClose closes a study: trialogue close --db PATH --study ID.
func runClose(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue close", flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "", dbUsage)
	study := fs.String("study", "", "study `id`")
	if ok, code := parseFlags(fs, args); !ok {
		return code
	}
	if *db == "" || *study == "" || fs.NArg() != 0 {
		fmt.Fprintln(stderr, "usage: trialogue close --db PATH --study ID")
		return exitUsage
	}
	st, code := openDB(ctx, *db, stderr)
	if st == nil {
		return code
	}
	defer st.Close()
	if err := st.CloseStudy(ctx, *study); err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		if errors.Is(err, store.ErrNotFound) {
			return exitUsage
		}
		return exitFail
	}
	h, err := st.ChainHead(ctx, *study)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	fmt.Fprintf(stdout, "Study %s is closed: it takes no new respondents, and its bundle will hold the allocation seed.\nChain head: %s (record %d, %s)\n", *study, h.Hash, h.Seq, h.At)
	return exitOK
}
