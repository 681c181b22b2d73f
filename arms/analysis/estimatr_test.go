package analysis

import (
	"encoding/csv"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"testing"
)

// relClose reports whether got is within rel of want, relative to want.
func relClose(got, want, rel float64) bool {
	if math.IsNaN(got) || math.IsNaN(want) {
		return math.IsNaN(got) && math.IsNaN(want)
	}
	return math.Abs(got-want) <= rel*math.Max(math.Abs(want), 1e-300)
}

// TestEffectsMatchEstimatr compares every estimator to R's estimatr
// (lm_robust with se_type = "HC2", lm_lin, difference_in_means, and
// p.adjust(method = "holm")) on 400 synthetic respondents drawn with a fixed
// seed, to a relative 1e-8: estimates, standard errors, t statistics,
// p-values, 95% intervals and degrees of freedom.
func TestEffectsMatchEstimatr(t *testing.T) {
	rscript := needTool(t, "Rscript")
	stratified := fixtureStudy(t, false)
	units, tab := fixture(t, stratified, 400, 1)
	dir := t.TempDir()
	in, out := filepath.Join(dir, "fixture.csv"), filepath.Join(dir, "estimatr.csv")
	writeRFixture(t, in, units, tab, fixtureControl)
	cmd := exec.Command(rscript, "../../testdata/analysis/estimatr.R", in, out)
	if msg, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("Rscript estimatr.R: %v\n%s", err, msg)
	}
	ref := readRefCSV(t, out)

	flat := fixtureStudy(t, true)
	flatUnits := make([]Unit, len(units))
	copy(flatUnits, units)
	for i := range flatUnits {
		flatUnits[i].Stratum, flatUnits[i].Slot = "all", i
	}
	base := Spec{ID: "rid", Outcome: "post", Control: fixtureControl}
	specs := []struct {
		name string
		flat bool
		mod  func(*Spec)
	}{
		{"flat-none", true, func(s *Spec) {}},
		{"strata-none", false, func(s *Spec) {}},
		{"strata-pre", false, func(s *Spec) { s.Adjust, s.Pre = AdjustPre, "pre" }},
		{"strata-lin", false, func(s *Spec) { s.Adjust, s.Pre, s.Covariates = AdjustLin, "pre", []string{"age", "stance"} }},
		{"flat-change", true, func(s *Spec) { s.Change, s.Pre = true, "pre" }},
		{"flat-lin", true, func(s *Spec) { s.Adjust, s.Pre, s.Covariates = AdjustLin, "pre", []string{"age"} }},
		{"dim", true, func(s *Spec) {}},
	}
	for _, sp := range specs {
		t.Run("OK"+sp.name, func(t *testing.T) {
			spec := base
			sp.mod(&spec)
			st, us := stratified, units
			if sp.flat {
				st, us = flat, flatUnits
			}
			rep, err := Analyze(st, us, tab, spec)
			if err != nil {
				t.Fatal(err)
			}
			if len(rep.Effects) != 3 {
				t.Fatalf("got %d effects, want 3", len(rep.Effects))
			}
			for _, e := range rep.Effects {
				want, ok := ref[sp.name+"/"+e.Arm]
				if !ok {
					t.Fatalf("R gave no row for %s/%s", sp.name, e.Arm)
				}
				checks := []struct {
					what      string
					got, want float64
				}{
					{"estimate", e.Estimate, want["estimate"]},
					{"std.error", e.SE, want["se"]},
				}
				if sp.name != "dim" { // difference_in_means uses Welch's df, the regression N - k
					checks = append(checks, []struct {
						what      string
						got, want float64
					}{
						{"statistic", e.T, want["t"]},
						{"p.value", e.P, want["p"]},
						{"conf.low", e.Low, want["low"]},
						{"conf.high", e.High, want["high"]},
						{"df", e.DF, want["df"]},
						{"p.adjust holm", e.PHolm, want["p_holm"]},
					}...)
				}
				for _, c := range checks {
					if !relClose(c.got, c.want, 1e-8) {
						t.Errorf("%s %s: got %.12g, want %.12g (estimatr)", e.Arm, c.what, c.got, c.want)
					}
				}
			}
		})
	}
}

// readRefCSV reads estimatr.R's output, keyed by spec/arm.
func readRefCSV(t *testing.T, path string) map[string]map[string]float64 {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	recs, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	out := map[string]map[string]float64{}
	for _, r := range recs[1:] {
		m := map[string]float64{}
		for j, h := range recs[0][2:] {
			v, err := strconv.ParseFloat(r[2+j], 64)
			if err != nil {
				v = math.NaN()
			}
			m[h] = v
		}
		out[r[0]+"/"+r[1]] = m
	}
	return out
}
