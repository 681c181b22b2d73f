package analysis

import (
	"bytes"
	"encoding/json"
	"os/exec"
	"strconv"
	"testing"
)

// TestTestsMatchScipy compares the balance and attrition tests to
// scipy.stats.chi2_contingency (correction=False) and scipy.stats.f_oneway
// on the fixture's tables, to a relative 1e-9: the tables the report's
// balance and attrition sections test.
func TestTestsMatchScipy(t *testing.T) {
	python := needPython(t, "scipy")
	st := fixtureStudy(t, false)
	units, tab := fixture(t, st, 400, 1)
	rep, err := Analyze(st, units, tab, Spec{ID: "rid", Outcome: "post", Pre: "pre", Control: fixtureControl})
	if err != nil {
		t.Fatal(err)
	}
	armIdx := map[string]int{}
	for i, a := range st.ArmOrder {
		armIdx[a] = i
	}
	// Tables built here from the units, independently of the report.
	levelTable := func(cov string, levels []string) [][]float64 {
		tbl := make([][]float64, len(st.ArmOrder))
		for i := range tbl {
			tbl[i] = make([]float64, len(levels))
		}
		for _, u := range units {
			for l, v := range levels {
				if u.Covariates[cov] == v {
					tbl[armIdx[u.Arm]][l]++
				}
			}
		}
		return tbl
	}
	attr := make([][]float64, len(st.ArmOrder))
	for i := range attr {
		attr[i] = make([]float64, 2)
	}
	ages := make([][]float64, len(st.ArmOrder))
	for i, u := range units {
		col := 1
		if tab.Rows[i][2] != "" {
			col = 0
		}
		attr[armIdx[u.Arm]][col]++
		a, _ := strconv.ParseFloat(u.Covariates["age"], 64)
		ages[armIdx[u.Arm]] = append(ages[armIdx[u.Arm]], a)
	}
	chi := [][][]float64{levelTable("lean", []string{"left", "centre", "right"}), levelTable("stance", []string{"favour", "against", "unsure"}), attr,
		{{12, 5, 9}, {3, 14, 8}}} // a small table with a strong association
	anova := [][][]float64{ages, {{1.1, 2.3, 1.9}, {3.2, 4.1, 3.3, 3.9}, {2.2, 2.0}}}
	req, _ := json.Marshal(map[string]any{"chi2": chi, "anova": anova})
	cmd := exec.Command(python, "../../testdata/analysis/scipy_tests.py")
	cmd.Stdin = bytes.NewReader(req)
	outb, err := cmd.Output()
	if err != nil {
		t.Fatalf("scipy_tests.py: %v", err)
	}
	var ref struct{ Chi2, Anova [][]float64 }
	if err := json.Unmarshal(outb, &ref); err != nil {
		t.Fatal(err)
	}
	chiGot := make([]ChiSquare, len(chi))
	for i, tbl := range chi {
		t.Run("OKChiSquare"+strconv.Itoa(i), func(t *testing.T) {
			cs, err := Independence(tbl)
			if err != nil {
				t.Fatal(err)
			}
			chiGot[i] = cs
			if !relClose(cs.Stat, ref.Chi2[i][0], 1e-9) || !relClose(cs.P, ref.Chi2[i][1], 1e-9) || float64(cs.DF) != ref.Chi2[i][2] {
				t.Errorf("got stat %.12g p %.12g df %d, want %.12g %.12g %v (scipy)", cs.Stat, cs.P, cs.DF, ref.Chi2[i][0], ref.Chi2[i][1], ref.Chi2[i][2])
			}
		})
	}
	for i, groups := range anova {
		t.Run("OKAnova"+strconv.Itoa(i), func(t *testing.T) {
			a, err := OneWay(groups)
			if err != nil {
				t.Fatal(err)
			}
			if !relClose(a.F, ref.Anova[i][0], 1e-9) || !relClose(a.P, ref.Anova[i][1], 1e-9) {
				t.Errorf("got F %.12g p %.12g, want %.12g %.12g (scipy)", a.F, a.P, ref.Anova[i][0], ref.Anova[i][1])
			}
		})
	}
	t.Run("OKReportUsesTheSameTests", func(t *testing.T) {
		want := map[string][2]float64{"lean": {ref.Chi2[0][0], ref.Chi2[0][1]}, "stance": {ref.Chi2[1][0], ref.Chi2[1][1]}, "age": {ref.Anova[0][0], ref.Anova[0][1]}}
		for _, b := range rep.Omnibus {
			w, ok := want[b.Covariate]
			if !ok {
				continue
			}
			if !relClose(b.Stat, w[0], 1e-9) || !relClose(b.P, w[1], 1e-9) {
				t.Errorf("balance %s: got %.12g p %.12g, want %.12g %.12g (scipy)", b.Covariate, b.Stat, b.P, w[0], w[1])
			}
		}
		if !rep.Attrition.Tested || !relClose(rep.Attrition.Test.Stat, ref.Chi2[2][0], 1e-9) || !relClose(rep.Attrition.Test.P, ref.Chi2[2][1], 1e-9) {
			t.Errorf("attrition: got %+v, want stat %.12g p %.12g (scipy)", rep.Attrition.Test, ref.Chi2[2][0], ref.Chi2[2][1])
		}
	})
}
