package analysis

import (
	"fmt"
	"math/rand/v2"
	"strconv"
	"testing"

	"trialogue/arms"
	"trialogue/arms/assign"
)

// benchStudy has six arms in blocks of 6 and 12 and strata by lean, like
// the demo study, and five covariates for the Lin adjustment.
const benchYAML = `id: larkspur-tramline
title: Larkspur tramline
covariates:
  - {name: age, type: integer, min: 18, max: 99, required: true}
  - {name: lean, type: choice, values: [left, centre, right], required: true}
  - {name: income, type: integer, min: 1, max: 10, required: true}
  - {name: years, type: integer, min: 0, max: 80, required: true}
strata: [lean]
allocation:
  blocks: [6, 12]
  arms: {a: 1, b: 1, c: 1, d: 1, e: 1, f: 1}
endpoints:
  offline: {kind: scripted}
arms:
  a: {kind: fixed, text: Larkspur plans a tramline.}
  b: {kind: fixed, text: Larkspur plans a tramline soon.}
  c: {kind: fixed, text: Larkspur plans a new tramline.}
  d: {kind: fixed, text: Larkspur plans a long tramline.}
  e: {kind: fixed, text: Larkspur plans a short tramline.}
  f: {kind: fixed, text: Larkspur plans a fast tramline.}
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}"
`

func benchData(b *testing.B, n int) (*arms.Study, []Unit, *Table) {
	st, err := arms.Parse("bench.yaml", []byte(benchYAML))
	if err != nil {
		b.Fatal(err)
	}
	plan, err := assign.NewPlan([]byte("bench-allocation-seed-0001"), st.Scheme())
	if err != nil {
		b.Fatal(err)
	}
	rng := rand.New(rand.NewPCG(1, 2))
	next := map[string]int{}
	tab := &Table{Name: "bench.csv", Delimiter: ',', Header: []string{"rid", "pre", "post", "trust"}}
	units := make([]Unit, n)
	for i := range units {
		u := Unit{RID: "B" + strconv.Itoa(i), Finished: true, Covariates: map[string]string{
			"age": strconv.Itoa(18 + rng.IntN(80)), "lean": []string{"left", "centre", "right"}[rng.IntN(3)],
			"income": strconv.Itoa(1 + rng.IntN(10)), "years": strconv.Itoa(rng.IntN(80))}}
		u.Stratum = st.StratumKey(arms.Respondent{Covariates: u.Covariates})
		u.Slot = next[u.Stratum]
		next[u.Stratum]++
		u.Arm = plan.Slot(u.Stratum, u.Slot).Arm
		units[i] = u
		pre := 50 + 10*rng.NormFloat64()
		tab.Rows = append(tab.Rows, []string{u.RID, fmt.Sprint(pre), fmt.Sprint(0.7*pre + 5*rng.NormFloat64()), fmt.Sprint(rng.IntN(7))})
		tab.RowNumbers = append(tab.RowNumbers, i+2)
	}
	return st, units, tab
}

// BenchmarkEffectsLin is the target: 100,000 respondents, 6 arms,
// Lin adjustment with 5 covariates (pre, age, income, years, trust) plus
// stratum indicators, and 10,000 randomization-inference re-draws.
func BenchmarkEffectsLin(b *testing.B) {
	st, units, tab := benchData(b, 100000)
	spec := Spec{ID: "rid", Outcome: "post", Pre: "pre", Adjust: AdjustLin, Covariates: []string{"age", "income", "years", "trust"},
		Control: []string{"a"}, Permutations: 10000, Seed: 1}
	b.ResetTimer()
	for b.Loop() {
		if _, err := Analyze(st, units, tab, spec); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkEffectsNone is the same data with the difference in means
// (stratum fixed effects) and 10,000 re-draws.
func BenchmarkEffectsNone(b *testing.B) {
	st, units, tab := benchData(b, 100000)
	spec := Spec{ID: "rid", Outcome: "post", Control: []string{"a"}, Permutations: 10000, Seed: 1}
	b.ResetTimer()
	for b.Loop() {
		if _, err := Analyze(st, units, tab, spec); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkRedrawStratum is one re-draw of one stratum of 33,334 analysed
// respondents (a third of BenchmarkEffectsNone's) in the demo study's
// blocks of 6 and 12: dealing the blocks and summing the outcome per arm.
func BenchmarkRedrawStratum(b *testing.B) {
	demo, _, err := arms.ParseFile("../../testdata/demo-study.yaml")
	if err != nil {
		b.Fatal(err)
	}
	sc := demo.Scheme()
	rng := rand.New(rand.NewPCG(1, 2))
	st := &riStratum{need: 33334, v: make([]float64, 33334)}
	for i := range st.v {
		st.v[i] = rng.NormFloat64()
	}
	d := newDealer(sc)
	seq := make([]int32, st.need+d.maxBlock())
	acc := make([]float64, 2*len(sc.Arms))
	draw := 0
	for b.Loop() {
		d.seed(drawSeed(1, draw))
		draw++
		d.deal(seq, st, 1, acc)
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N)/float64(st.need), "ns/slot")
}
