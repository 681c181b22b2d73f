package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"

	"trialogue/arms"
	"trialogue/arms/analysis"
	"trialogue/arms/flags"
	"trialogue/store"
)

const effectsUsage = `usage: trialogue effects --db PATH --study ID --outcomes FILE.csv --id COLUMN --outcome COLUMN[,COLUMN...]
         [--pre COLUMN] [--covariates a,b,...] --control ARM[,ARM...] [--adjust none|pre|lin] [--change]
         [--permutations N] [--seed N] [--exclude-flagged] [--out DIR]`

// effectsFlags are the effects command's options.
type effectsFlags struct {
	db, study, outcomes, out string
	outcomeCols              []string
	spec                     analysis.Spec
	excludeFlagged           bool
}

func splitList(v string) []string {
	var out []string
	for _, p := range strings.Split(v, ",") {
		if p = strings.TrimSpace(p); p != "" {
			out = append(out, p)
		}
	}
	return out
}

func parseEffectsFlags(args []string, stderr io.Writer) (*effectsFlags, error) {
	fs := flag.NewFlagSet("trialogue effects", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() { fmt.Fprintln(stderr, effectsUsage); fs.PrintDefaults() }
	f := &effectsFlags{}
	var outcome, covs, control string
	fs.StringVar(&f.db, "db", "trialogue.db", dbUsage)
	fs.StringVar(&f.study, "study", "", "study `id`")
	fs.StringVar(&f.outcomes, "outcomes", "", "outcome `file` exported by the survey (CSV, comma or semicolon)")
	fs.StringVar(&f.spec.ID, "id", "", "outcome-file `column` holding the respondent id (rid)")
	fs.StringVar(&outcome, "outcome", "", "outcome `column`s, comma-separated")
	fs.StringVar(&f.spec.Pre, "pre", "", "pre-treatment measure `column`")
	fs.StringVar(&covs, "covariates", "", "covariates for Lin and balance: study covariates or file columns, `a,b,...`")
	fs.StringVar(&control, "control", "", "arms pooled as the control, `ARM,ARM`")
	fs.StringVar(&f.spec.Adjust, "adjust", analysis.AdjustNone, "adjustment: none, pre or lin")
	fs.BoolVar(&f.spec.Change, "change", false, "analyse the outcome minus the pre-treatment measure")
	fs.IntVar(&f.spec.Permutations, "permutations", analysis.DefaultPermutations, "randomization-inference re-draws (0 skips them)")
	var seed uint64 = 1
	fs.Uint64Var(&seed, "seed", seed, "master `seed` of the randomization-inference re-draws")
	fs.BoolVar(&f.excludeFlagged, "exclude-flagged", false, "leave out sessions whose transcripts are flagged")
	fs.StringVar(&f.out, "out", "", "`folder` for effects.csv, balance.csv, attrition.csv, effects.json and effects.svg")
	if err := fs.Parse(args); err != nil {
		return nil, err
	}
	if fs.NArg() > 0 {
		return nil, fmt.Errorf("unexpected argument %q", fs.Arg(0))
	}
	f.spec.Seed = seed
	f.outcomeCols = splitList(outcome)
	f.spec.Covariates = splitList(covs)
	f.spec.Control = splitList(control)
	var missing []string
	for _, m := range []struct{ name, v string }{{"--study", f.study}, {"--outcomes", f.outcomes}, {"--id", f.spec.ID}, {"--outcome", outcome}} {
		if m.v == "" {
			missing = append(missing, m.name)
		}
	}
	if len(missing) > 0 {
		return nil, fmt.Errorf("missing %s\n%s", strings.Join(missing, ", "), effectsUsage)
	}
	return f, nil
}

// runEffects estimates each treatment arm's effect on the outcomes.
func runEffects(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	f, err := parseEffectsFlags(args, stderr)
	if err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		fmt.Fprintf(stderr, "trialogue effects: %v\n", err)
		return exitUsage
	}
	study, units, leftOut, code := loadDesign(ctx, f.db, f.study, f.excludeFlagged, stdout, stderr)
	if code != exitOK {
		return code
	}
	f.spec.LeftOut = leftOut
	file, err := os.Open(f.outcomes)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue effects: %v\n", err)
		return exitUsage
	}
	reps, err := analysis.Run(study, units, file, filepath.Base(f.outcomes), f.outcomeCols, f.spec)
	file.Close()
	if err != nil {
		return analysisFailed(stderr, "effects", err)
	}
	for i, rep := range reps {
		if i > 0 {
			fmt.Fprintln(stdout)
		}
		if err := analysis.WriteText(stdout, rep); err != nil {
			fmt.Fprintf(stderr, "trialogue effects: %v\n", err)
			return exitFail
		}
	}
	if f.out != "" {
		if err := writeEffectsFiles(f.out, reps); err != nil {
			fmt.Fprintf(stderr, "trialogue effects: %v\n", err)
			return exitFail
		}
		fmt.Fprintf(stdout, "\nWrote effects.csv, balance.csv, attrition.csv, effects.json and effects.svg to %s\n", f.out)
	}
	return exitOK
}

// analysisFailed prints an analysis error; bad input exits 2.
func analysisFailed(stderr io.Writer, cmd string, err error) int {
	var ie *analysis.InputError
	if errors.As(err, &ie) {
		for _, p := range ie.Problems {
			fmt.Fprintf(stderr, "trialogue %s: %s\n", cmd, p)
		}
		return exitUsage
	}
	fmt.Fprintf(stderr, "trialogue %s: %v\n", cmd, err)
	return exitFail
}

// loadDesign reads the study's newest version and its sessions, leaving out
// those whose transcripts are flagged when asked (and saying how many, by
// flag: leaving out respondents after assignment can bias the comparison if
// the arms are flagged at different rates).
func loadDesign(ctx context.Context, db, id string, excludeFlagged bool, stdout, stderr io.Writer) (*arms.Study, []analysis.Unit, map[string]bool, int) {
	st, code := openDB(ctx, db, stderr)
	if code != exitOK {
		return nil, nil, nil, code
	}
	defer st.Close()
	d, code := readDesign(ctx, st, db, id, stderr)
	if code != exitOK {
		return nil, nil, nil, code
	}
	if !excludeFlagged {
		return d.Study, d.Units, nil, exitOK
	}
	flagged, err := st.Flags(ctx, d.Study, id)
	if err == nil {
		var sessions []store.Session
		if sessions, err = st.Sessions(ctx, id); err == nil {
			units, left, counts := withoutFlagged(d.Units, sessions, flagged)
			fmt.Fprintf(stdout, "Left out %d of %d respondents whose transcripts are flagged (%s); flagged respondents per arm can differ, so compare with the full analysis.\n\n",
				len(d.Units)-len(units), len(d.Units), counts)
			return d.Study, units, left, exitOK
		}
	}
	fmt.Fprintf(stderr, "trialogue effects: --exclude-flagged: %v\n", err)
	return nil, nil, nil, exitFail
}

// withoutFlagged drops the units whose sessions carry any flag, and counts
// the flags seen among them.
func withoutFlagged(units []analysis.Unit, sessions []store.Session, flagged map[int64][]flags.Flag) ([]analysis.Unit, map[string]bool, string) {
	drop := map[string]bool{}
	count := map[string]int{}
	for _, s := range sessions {
		fs, ok := flagged[s.ID]
		if !ok || len(fs) == 0 {
			continue
		}
		drop[s.RID] = true
		for _, f := range fs {
			count[f.Code]++
		}
	}
	out := make([]analysis.Unit, 0, len(units))
	for _, u := range units {
		if !drop[u.RID] {
			out = append(out, u)
		}
	}
	codes := make([]string, 0, len(count))
	for c, n := range count {
		codes = append(codes, fmt.Sprintf("%s %d", c, n))
	}
	sort.Strings(codes)
	if len(codes) == 0 {
		return out, drop, "no flags"
	}
	return out, drop, strings.Join(codes, ", ")
}

// readDesign reads a study's design; a study the database lacks is bad input.
func readDesign(ctx context.Context, st *store.Store, db, id string, stderr io.Writer) (*store.Design, int) {
	d, err := st.Design(ctx, id)
	if errors.Is(err, store.ErrNotFound) {
		fmt.Fprintf(stderr, "trialogue: study %q is not in %s\n", id, db)
		return nil, exitUsage
	}
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return nil, exitFail
	}
	return d, exitOK
}

func writeEffectsFiles(dir string, reps []*analysis.Report) error {
	if err := os.MkdirAll(dir, 0o755); err != nil {
		return fmt.Errorf("create %s: %w", dir, err)
	}
	return analysis.WriteFiles(folderCreate(dir), reps)
}

// folderCreate opens named files in a folder, for the WriteFiles functions.
func folderCreate(dir string) func(name string) (io.WriteCloser, error) {
	return func(name string) (io.WriteCloser, error) {
		path := filepath.Join(dir, name)
		file, err := os.Create(path)
		if err != nil {
			return nil, fmt.Errorf("create %s: %w", path, err)
		}
		return file, nil
	}
}
