package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"sort"
	"strings"
	"text/tabwriter"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/web"
)

// runCheck validates a study file and shows what it will do.
func runCheck(args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("trialogue check", flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() { fmt.Fprintln(stderr, "usage: trialogue check FILE") }
	if ok, code := parseFlags(fs, args); !ok {
		return code
	}
	if fs.NArg() != 1 {
		fs.Usage()
		return exitUsage
	}
	path := fs.Arg(0)
	def, _, err := arms.ParseFile(path)
	if err != nil {
		fmt.Fprintln(stderr, err)
		var probs *arms.Problems
		if errors.As(err, &probs) {
			fmt.Fprintf(stderr, "%d error(s) in %s\n", len(probs.List), path)
		}
		return exitUsage
	}
	assets, err := web.Load()
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	var unknown []string
	known := assets.TextKeys()
	for k := range def.Texts {
		if !known[k] {
			unknown = append(unknown, k)
		}
	}
	for lang, texts := range def.Translations {
		for k := range texts {
			if !known[k] {
				unknown = append(unknown, "translations."+lang+"."+k)
			}
		}
	}
	if len(unknown) > 0 {
		sort.Strings(unknown)
		fmt.Fprintf(stderr, "%s: texts: unknown key(s) %s; known keys are those of web/messages/en.json\n", path, strings.Join(unknown, ", "))
		return exitUsage
	}
	// A page language without a full translation would show respondents
	// English strings in the middle of their own language.
	missing := false
	for _, lang := range def.PageLanguages() {
		if miss := assets.Missing(lang, def.TextOverrides(lang)); len(miss) > 0 {
			where := "translations." + lang
			if lang == def.Language {
				where = "texts"
			}
			fmt.Fprintf(stderr, "%s: language %s: no translation for %d key(s): %s; translate them under %s (Trialogue ships catalogues for %s)\n",
				path, lang, len(miss), strings.Join(miss, ", "), where, strings.Join(assets.Languages(), ", "))
			missing = true
		}
	}
	if missing {
		return exitUsage
	}
	if err := describe(stdout, def); err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitFail
	}
	return exitOK
}

// describe prints a valid study: its version hash, each arm's prompts for
// an example respondent, and the allocation plan.
func describe(w io.Writer, def *arms.Study) error {
	hash, err := def.Hash()
	if err != nil {
		return err
	}
	fmt.Fprintf(w, "%s is valid.\n\nStudy %q: %s\nLanguage: %s\nVersion hash (SHA-256 of the canonical form): %s\n\n", def.ID, def.ID, def.Title, def.Language, hash)
	ex := def.Example()
	var covs []string
	for _, c := range def.Covariates {
		if v, ok := ex.Covariates[c.Name]; ok {
			covs = append(covs, c.Name+"="+v)
		}
	}
	fmt.Fprintf(w, "Arms, rendered for an example respondent (%s):\n", strings.Join(covs, ", "))
	for _, name := range def.ArmOrder {
		a := def.Arms[name]
		fmt.Fprintf(w, "\n== %s (%s, code %s)\n", name, a.Kind, a.Code)
		switch a.Kind {
		case arms.KindFixed:
			fmt.Fprintf(w, "Text:\n%s\n", indent(strings.TrimSpace(a.Text)))
			fmt.Fprintf(w, "Continue after %d s\n", a.MinSeconds)
		default:
			r, err := def.Render(name, ex)
			if err != nil {
				return err
			}
			e := def.Endpoints[a.Endpoint]
			fmt.Fprintf(w, "Endpoint: %s (%s, model %s)\n", a.Endpoint, e.Kind, e.Model)
			fmt.Fprintf(w, "System prompt:\n%s\n", indent(r.System))
			if r.Prompt != "" {
				fmt.Fprintf(w, "Request for the model's %s:\n%s\n", map[bool]string{true: "message", false: "opening"}[a.Kind == arms.KindMessage], indent(r.Prompt))
			}
			if a.Kind == arms.KindChat {
				lim := a.RepliesOf()
				fmt.Fprintf(w, "Replies: at least %d, at most %d; at least %d words and at most %d characters each\n", lim.Min, lim.Max, lim.MinWords, lim.MaxChars)
			}
		}
	}
	sc := def.Scheme()
	sum := 0
	for _, r := range sc.Arms {
		sum += r.Weight
	}
	fmt.Fprintf(w, "\nAllocation: permuted blocks of size %s, drawn at random for each block, within each stratum.\n", joinInts(sc.Blocks))
	strata := def.StrataKeys()
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	fmt.Fprint(tw, "stratum\t")
	for _, r := range sc.Arms {
		fmt.Fprintf(tw, "%s\t", r.Arm)
	}
	fmt.Fprintln(tw)
	for _, s := range strata {
		fmt.Fprintf(tw, "%s\t", s)
		for _, r := range sc.Arms {
			fmt.Fprintf(tw, "%d/%d\t", r.Weight, sum)
		}
		fmt.Fprintln(tw)
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	fmt.Fprintf(w, "%d strata × %d arms. The allocation seed is drawn when the study is first served and kept in the database.\n", len(strata), len(sc.Arms))
	return nil
}

func indent(s string) string { return "    " + strings.ReplaceAll(s, "\n", "\n    ") }

func joinInts(v []int) string {
	parts := make([]string, len(v))
	for i, n := range v {
		parts[i] = fmt.Sprint(n)
	}
	return strings.Join(parts, " or ")
}

// runCode checks completion codes: trialogue code verify --db PATH --study ID RID CODE.
func runCode(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 || args[0] != "verify" {
		fmt.Fprintln(stderr, "usage: trialogue code verify --db PATH --study ID RID CODE")
		return exitUsage
	}
	fs := flag.NewFlagSet("trialogue code verify", flag.ContinueOnError)
	fs.SetOutput(stderr)
	db := fs.String("db", "trialogue.db", dbUsage)
	study := fs.String("study", "", "study `id`")
	if err := fs.Parse(args[1:]); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK
		}
		return exitUsage
	}
	if fs.NArg() != 2 || *study == "" {
		fmt.Fprintln(stderr, "usage: trialogue code verify --db PATH --study ID RID CODE")
		return exitUsage
	}
	st, status := openDB(ctx, *db, stderr)
	if st == nil {
		return status
	}
	defer st.Close()
	sv, err := st.Study(ctx, *study)
	if err != nil {
		fmt.Fprintf(stderr, "trialogue: %v\n", err)
		return exitUsage
	}
	rid, code := fs.Arg(0), fs.Arg(1)
	if !codes.VerifyCompletion(sv.Secret, sv.ID, rid, code) {
		fmt.Fprintf(stdout, "NOT valid: %s is not the completion code of respondent %s in study %s\n", code, rid, sv.ID)
		return exitFail
	}
	msg := "valid"
	if sess, err := st.SessionByRID(ctx, sv.ID, rid); err == nil {
		msg += fmt.Sprintf(" (arm code %s, finished %t)", sess.ArmCode, sess.Finished())
	} else {
		msg += " (no session of this respondent is stored)"
	}
	fmt.Fprintf(stdout, "%s: %s\n", msg, codes.NormalizeCode(code))
	return exitOK
}
