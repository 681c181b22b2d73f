package analysis

import (
	"errors"
	"math"
	"slices"
	"strings"
	"testing"
)

func TestAnalyze(t *testing.T) {
	st := fixtureStudy(t, false)
	units, tab := fixture(t, st, 400, 1)
	spec := Spec{ID: "rid", Outcome: "post", Pre: "pre", Adjust: AdjustLin, Covariates: []string{"age", "stance"},
		Control: fixtureControl, Permutations: 400, Seed: 7}
	rep, err := Analyze(st, units, tab, spec)
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OKRandomizationInference", func(t *testing.T) {
		for _, e := range rep.Effects {
			if e.PRI < 1.0/401 || e.PRI > 1 {
				t.Errorf("%s: p_ri %v outside [1/401, 1]", e.Arm, e.PRI)
			}
		}
		// The planted effect of debate (5 points, about 10 standard errors)
		// is beyond every re-draw: the smallest p-value 1/(N+1).
		if d := rep.Effects[1]; d.Arm != "debate" || d.PRI != 1.0/401 {
			t.Errorf("debate: got arm %s p_ri %v, want debate 1/401", d.Arm, d.PRI)
		}
		again, err := Analyze(st, units, tab, spec)
		if err != nil {
			t.Fatal(err)
		}
		for k := range rep.Effects {
			if again.Effects[k].PRI != rep.Effects[k].PRI {
				t.Errorf("%s: p_ri %v then %v with the same seed", rep.Effects[k].Arm, rep.Effects[k].PRI, again.Effects[k].PRI)
			}
		}
	})
	t.Run("OKRandomizationAgreesWithTUnderNull", func(t *testing.T) {
		// letter's effect (2 points) is near its standard error: both
		// p-values are moderate, and the RI and t-test p-values agree to
		// within simulation error (common practice: they coincide
		// asymptotically).
		e := rep.Effects[0]
		if math.Abs(e.PRI-e.P) > 0.1 {
			t.Errorf("letter: p_ri %v and p %v differ by more than 0.1", e.PRI, e.P)
		}
	})
	t.Run("OKJoinCounts", func(t *testing.T) {
		if rep.Join.Rows != 400 || rep.Join.Matched != 400 || rep.Join.SessionsNoRow != 0 || rep.Join.AnalysedOutcome+rep.Join.MissingOutcome != 400 {
			t.Errorf("got join %+v, want 400 rows matched and analysed + missing = 400", rep.Join)
		}
	})
	t.Run("OKAttritionAndBalanceTables", func(t *testing.T) {
		assigned, observed := 0, 0
		for _, r := range rep.Attrition.Rows {
			assigned += r.Assigned
			observed += r.Observed
		}
		if assigned != 400 || observed != rep.N {
			t.Errorf("attrition: got %d assigned and %d observed, want 400 and %d", assigned, observed, rep.N)
		}
		var covs []string
		for _, b := range rep.Omnibus {
			covs = append(covs, b.Covariate+":"+b.Test)
		}
		want := []string{"age:anova F", "lean:chi-square", "stance:chi-square", "pre:anova F"}
		if !slices.Equal(covs, want) {
			t.Errorf("balance tests: got %v, want %v", covs, want)
		}
	})
}

func TestAnalyzeBadInput(t *testing.T) {
	st := fixtureStudy(t, false)
	units, tab := fixture(t, st, 60, 3)
	base := Spec{ID: "rid", Outcome: "post", Control: fixtureControl}
	edit := func(f func(*Table)) *Table {
		c := &Table{Name: tab.Name, Delimiter: ',', Header: tab.Header, RowNumbers: tab.RowNumbers}
		for _, r := range tab.Rows {
			c.Rows = append(c.Rows, slices.Clone(r))
		}
		f(c)
		return c
	}
	cases := []struct {
		name  string
		tab   *Table
		units []Unit
		spec  func(*Spec)
		want  string
	}{
		{"ErrDuplicateID", edit(func(c *Table) { c.Rows[5][0] = c.Rows[2][0] }), units, nil, `duplicate ids: "R0002" in rows 4 and 7`},
		{"ErrUnknownID", edit(func(c *Table) { c.Rows[3][0] = "R9999" }), units, nil, `1 id(s) match no session of study brackenmoor-ferry: row 5 ("R9999")`},
		{"ErrEmptyID", edit(func(c *Table) { c.Rows[0][0] = "" }), units, nil, `the id column "rid" is empty in rows 2`},
		{"ErrNonNumericOutcome", edit(func(c *Table) { c.Rows[1][2] = "seven"; c.Rows[8][2] = "n/a" }), units, nil, `column "post" has cells that are not numbers: row 3 ("seven"), row 10 ("n/a")`},
		{"ErrAllMissingOutcome", edit(func(c *Table) {
			for _, r := range c.Rows {
				r[2] = ""
			}
		}), units, nil, `column "post" is empty in every row`},
		{"ErrUnknownControl", tab, units, func(s *Spec) { s.Control = []string{"notice", "placebo"} }, `control arm "placebo" does not exist in study brackenmoor-ferry; its arms are notice, chat-only, letter, debate, tailored`},
		{"ErrNoControl", tab, units, func(s *Spec) { s.Control = nil }, "name the control arm(s) with --control"},
		{"ErrAllControl", tab, units, func(s *Spec) { s.Control = st.ArmOrder }, "every arm is a control arm"},
		{"ErrTooFewInArm", edit(func(c *Table) {
			kept := 0
			for i, u := range units {
				if u.Arm == "tailored" && c.Rows[i][2] != "" {
					if kept == 1 {
						c.Rows[i][2] = ""
					} else {
						kept++
					}
				}
			}
		}), units, nil, `arm "tailored" has 1 respondent(s) with an outcome; at least 2 are needed`},
		{"ErrMissingPre", edit(func(c *Table) { c.Rows[4][1] = "" }), units, func(s *Spec) { s.Adjust, s.Pre = AdjustPre, "pre" }, `the pre-treatment column "pre" is empty in rows 6`},
		{"ErrAdjust", tab, units, func(s *Spec) { s.Adjust = "ancova" }, `--adjust must be none, pre or lin, not "ancova"`},
		{"ErrChangeWithoutPre", tab, units, func(s *Spec) { s.Change = true }, "--change need the pre-treatment column"},
		{"ErrUnknownCovariate", tab, units, func(s *Spec) { s.Adjust, s.Covariates = AdjustLin, []string{"income"} }, `covariate "income" is neither a covariate of study brackenmoor-ferry nor a usable outcome-file column`},
		{"ErrNoOutcomeColumn", tab, units, func(s *Spec) { s.Outcome = "attitude" }, `no column "attitude"`},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			spec := base
			if c.spec != nil {
				c.spec(&spec)
			}
			rep, err := Analyze(st, c.units, c.tab, spec)
			var ie *InputError
			if !errors.As(err, &ie) || !strings.Contains(err.Error(), c.want) {
				t.Fatalf("got report %v and error %v; want an InputError containing %q", rep != nil, err, c.want)
			}
		})
	}
	t.Run("OKSameInputWithoutTheFault", func(t *testing.T) {
		if _, err := Analyze(st, units, tab, base); err != nil {
			t.Fatalf("got %v, want the unedited input to pass", err)
		}
	})
	t.Run("OKSessionsWithoutRows", func(t *testing.T) {
		short := edit(func(c *Table) { c.Rows, c.RowNumbers = c.Rows[:50], c.RowNumbers[:50] })
		rep, err := Analyze(st, units, short, base)
		if err != nil {
			t.Fatal(err)
		}
		if rep.Join.SessionsNoRow != 10 {
			t.Fatalf("got %d sessions without a row, want 10", rep.Join.SessionsNoRow)
		}
	})
	t.Run("ErrLinWithoutCovariates", func(t *testing.T) {
		// Stratum indicators count as covariates for Lin; an unstratified
		// study has none.
		flat := fixtureStudy(t, true)
		spec := base
		spec.Adjust = AdjustLin
		_, err := Analyze(flat, units, tab, spec)
		if err == nil || !strings.Contains(err.Error(), "--adjust lin needs at least one covariate") {
			t.Fatalf("got %v, want an error asking for covariates", err)
		}
	})
}
