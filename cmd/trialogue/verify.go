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

// Exit statuses of verify and bundle, beyond exitOK, exitFail (the chain or
// the records do not hold) and exitUsage.
const (
	exitAllocation = 3 // the allocation audit failed: assignments differ from the seed's sequence
	exitArchive    = 4 // the bundle is truncated or not a readable archive
	exitFormat     = 5 // the bundle was written by a newer format than this binary reads
	exitMissing    = 6 // a file the bundle must hold is missing
)

// runVerify checks a study's hash chain, its records against the chain, and
// its allocation: trialogue verify (--db PATH --study ID | BUNDLE).
func runVerify(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue verify", flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "", dbUsage)
	study := fs.String("study", "", "study `id`")
	fs.Usage = func() {
		fmt.Fprintln(stderr, "usage: trialogue verify --db PATH --study ID\n       trialogue verify BUNDLE.tar.gz")
	}
	if ok, code := parseFlags(fs, args); !ok {
		return code
	}
	var d *store.Dataset
	switch {
	case *db != "" && *study != "" && fs.NArg() == 0:
		st, code := openDB(ctx, *db, stderr)
		if st == nil {
			return code
		}
		defer st.Close()
		var err error
		if d, err = st.LoadDataset(ctx, *study); err != nil {
			fmt.Fprintf(stderr, "trialogue: %v\n", err)
			if errors.Is(err, store.ErrNotFound) {
				return exitUsage
			}
			return exitFail
		}
	case *db == "" && *study == "" && fs.NArg() == 1:
		b, err := store.ReadBundle(fs.Arg(0))
		if err != nil {
			fmt.Fprintf(stderr, "trialogue: %v\n", err)
			return bundleExit(err)
		}
		d = b.Dataset
		fmt.Fprintf(stdout, "Bundle %s: study %s, written %s%s\n", fs.Arg(0), d.Study, b.Manifest.Written, map[bool]string{true: ", release copy (masked)", false: ""}[b.Manifest.Release])
	default:
		fs.Usage()
		return exitUsage
	}
	return report(stdout, d.Check())
}

// report prints an audit and returns its exit status.
func report(w io.Writer, r store.Report) int {
	fmt.Fprintf(w, "Study %s: %d chain records, %d sessions, %d turns\n", r.Study, r.Records, r.Sessions, r.Turns)
	status := exitOK
	if r.Chain != nil {
		fmt.Fprintf(w, "CHAIN BROKEN at record %d: %s: %s\n", r.Chain.Seq, r.Chain.How, r.Chain.Detail)
		status = exitFail
	} else {
		fmt.Fprintf(w, "Chain holds. Head: record %d, %s, hash %s\n", r.Head.Seq, r.Head.At, r.Head.Hash)
	}
	for _, m := range r.Mismatch {
		fmt.Fprintf(w, "RECORD MISMATCH: %s\n", m)
		status = exitFail
	}
	switch {
	case r.Sealed:
		fmt.Fprintln(w, "Allocation audit: not done, the allocation seed is sealed until the study is closed")
	case len(r.Allocated) == 0:
		fmt.Fprintln(w, "Allocation audit: every assignment is the arm the seed's sequence gives its slot; no slot repeated or skipped")
	default:
		for _, a := range r.Allocated {
			fmt.Fprintf(w, "ALLOCATION: %s\n", a)
		}
		if status == exitOK {
			status = exitAllocation
		}
	}
	if status == exitOK {
		fmt.Fprintln(w, "verified")
	}
	return status
}

// bundleExit maps a bundle reading error to its exit status.
func bundleExit(err error) int {
	switch {
	case errors.Is(err, store.ErrBundleFormat):
		return exitFormat
	case errors.Is(err, store.ErrBundleMissing):
		return exitMissing
	case errors.Is(err, store.ErrBundleArchive):
		return exitArchive
	case errors.Is(err, os.ErrNotExist):
		return exitUsage
	}
	return exitFail
}
