package main

import (
	"context"
	"encoding/json"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"

	"trialogue/arms"
	"trialogue/arms/drift"
	"trialogue/arms/responder"
	"trialogue/server"
	"trialogue/store"
)

// driftReport is what a drift run stores and prints.
type driftReport struct {
	VsBaseline *drift.Report `json:"vs_baseline,omitempty"`
	VsPrevious *drift.Report `json:"vs_previous,omitempty"`
	Runs       int           `json:"runs"`
	Replies    int           `json:"replies"`
}

// runDrift plays a study's probes against its endpoints and compares the
// replies with the baseline and the previous run:
// trialogue drift --db PATH --study ID [--runs N].
func runDrift(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue drift", flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "", dbUsage)
	study := fs.String("study", "", "study `id`")
	runs := fs.Int("runs", 0, "times each probe is played (default: the study's drift.runs, or 5)")
	if ok, code := parseFlags(fs, args); !ok {
		return code
	}
	if *db == "" || *study == "" || fs.NArg() != 0 || *runs < 0 || *runs > 100 {
		fmt.Fprintln(stderr, "usage: trialogue drift --db PATH --study ID [--runs N (1 to 100)]")
		return exitUsage
	}
	st, code := openDB(ctx, *db, stderr)
	if st == nil {
		return code
	}
	defer st.Close()
	sv, err := st.Study(ctx, *study)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitUsage
	}
	canonical, err := st.StudyCanonical(ctx, sv.ID, sv.Version)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	def, err := arms.FromCanonical(canonical)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	if len(def.Probes) == 0 {
		fmt.Fprintf(stderr, "trialogue: study %s declares no probes: add a probes: list to its file (see README, Drift check)\n", sv.ID)
		return exitUsage
	}
	rs, err := server.Responders(def, os.Getenv)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitUsage
	}
	run, err := driftCheck(ctx, st, def, sv, rs, *runs)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	printDrift(stdout, run)
	if run.Status == drift.Fail {
		return exitFail
	}
	return exitOK
}

// driftCheck plays the probes, compares and stores the run.
func driftCheck(ctx context.Context, st *store.Store, def *arms.Study, sv store.StudyVersion, rs map[string]responder.Responder, runs int) (store.DriftRun, error) {
	th, n := drift.Settings(def)
	if runs > 0 {
		n = runs
	}
	outs, err := drift.Play(ctx, def, rs, n)
	if err != nil {
		return store.DriftRun{}, err
	}
	rep := driftReport{Runs: n, Replies: len(outs)}
	status := "baseline"
	baseline, latest, err := st.DriftReference(ctx, sv.ID, sv.Hash)
	switch {
	case errors.Is(err, store.ErrNotFound):
	case err != nil:
		return store.DriftRun{}, err
	default:
		b := drift.Compare(baseline.Outputs, outs, th)
		rep.VsBaseline, status = &b, b.Status
		if latest.ID != baseline.ID {
			p := drift.Compare(latest.Outputs, outs, th)
			rep.VsPrevious = &p
			// The baseline decides; a change since the previous run alone warns.
			if p.Status != drift.Pass && status == drift.Pass {
				status = drift.Warn
			}
		}
	}
	js, err := json.Marshal(rep)
	if err != nil {
		return store.DriftRun{}, err
	}
	return st.SaveDriftRun(ctx, store.DriftRun{Study: sv.ID, Version: sv.Version, StudyHash: sv.Hash, Status: status, Report: string(js), Outputs: outs})
}

func printDrift(w io.Writer, run store.DriftRun) {
	var rep driftReport
	_ = json.Unmarshal([]byte(run.Report), &rep)
	fmt.Fprintf(w, "Drift run %d of study %s (version %d): %d probe replies over %d run(s).\n", run.ID, run.Study, run.Version, rep.Replies, rep.Runs)
	if run.Baseline {
		fmt.Fprintln(w, "This is the first run on this study version: it is the BASELINE that later runs are compared with.")
		return
	}
	for _, x := range []struct {
		name string
		r    *drift.Report
	}{{"against the baseline", rep.VsBaseline}, {"against the previous run", rep.VsPrevious}} {
		if x.r == nil {
			continue
		}
		fmt.Fprintf(w, "\n%s: %s\n", x.name, x.r.Status)
		for _, c := range x.r.Checks {
			fmt.Fprintf(w, "  %-26s %-4s  %s\n", c.Name, c.Status, c.Detail)
		}
		fmt.Fprintf(w, "  %s\n", x.r.Summary)
	}
	fmt.Fprintf(w, "\nResult: %s\n", run.Status)
}
