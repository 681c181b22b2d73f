package analysis

import (
	"bytes"
	"encoding/csv"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"strconv"
	"testing"

	"trialogue/arms"
	"trialogue/arms/assign"
)

// fixtureYAML is a fictional study with two control arms to pool, three
// treatment arms and strata by lean.
const fixtureYAML = `id: brackenmoor-ferry
title: Brackenmoor river ferry
covariates:
  - {name: age, type: integer, min: 18, max: 99, required: true}
  - {name: lean, type: choice, values: [left, centre, right], required: true}
  - {name: stance, type: choice, values: [favour, against, unsure], required: true}
strata: [lean]
allocation:
  blocks: [5, 10]
  arms: {notice: 1, chat-only: 1, letter: 1, debate: 1, tailored: 1}
endpoints:
  offline: {kind: scripted}
arms:
  notice: {kind: fixed, text: Brackenmoor considers a river ferry.}
  chat-only:
    kind: chat
    endpoint: offline
    replies: {min: 1, max: 3}
    system: You chat about gardening.
  letter: {kind: fixed, text: Please support the Brackenmoor ferry.}
  debate:
    kind: chat
    endpoint: offline
    replies: {min: 1, max: 3}
    system: You argue for the Brackenmoor ferry.
  tailored:
    kind: message
    endpoint: offline
    system: You write to a resident of Brackenmoor.
    prompt: Write a message about the ferry.
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}"
`

// fixtureControl is the pooled control of the fixture.
var fixtureControl = []string{"notice", "chat-only"}

// fixtureEffects are the planted effects on post, by arm.
var fixtureEffects = map[string]float64{"notice": 0, "chat-only": 0, "letter": 2, "debate": 5, "tailored": -1}

func fixtureStudy(t testing.TB, flat bool) *arms.Study {
	t.Helper()
	src := fixtureYAML
	if flat {
		src = string(bytes.Replace([]byte(src), []byte("strata: [lean]\n"), nil, 1))
	}
	st, err := arms.Parse("fixture.yaml", []byte(src))
	if err != nil {
		t.Fatalf("parse fixture study: %v", err)
	}
	return st
}

// fixture draws n respondents with a fixed seed: covariates, the arm the
// study's scheme assigns at their stratum's next slot, a pre-treatment
// measure and an outcome with the planted effects; about one in ten has no
// outcome, and about one in eight did not finish.
func fixture(t testing.TB, st *arms.Study, n int, seed uint64) ([]Unit, *Table) {
	t.Helper()
	rng := rand.New(rand.NewPCG(seed, 2027))
	plan, err := assign.NewPlan([]byte("fixture-allocation-seed-0001"), st.Scheme())
	if err != nil {
		t.Fatal(err)
	}
	next := map[string]int{}
	leans := []string{"left", "centre", "right"}
	stances := []string{"favour", "against", "unsure"}
	tab := &Table{Name: "fixture.csv", Delimiter: ',', Header: []string{"rid", "pre", "post", "extra"}}
	var units []Unit
	for i := range n {
		age := 18 + rng.IntN(70)
		lean := leans[rng.IntN(3)]
		stance := stances[rng.IntN(3)]
		u := Unit{RID: fmt.Sprintf("R%04d", i), Covariates: map[string]string{"age": strconv.Itoa(age), "lean": lean, "stance": stance}}
		u.Stratum = st.StratumKey(arms.Respondent{RID: u.RID, Covariates: u.Covariates})
		u.Slot = next[u.Stratum]
		next[u.Stratum]++
		u.Arm = plan.Slot(u.Stratum, u.Slot).Arm
		u.Finished = rng.IntN(8) != 0
		units = append(units, u)
		pre := 40 + 0.3*float64(age) + 8*rng.NormFloat64()
		if stance == "favour" {
			pre += 6
		}
		post := 5 + 0.8*pre + fixtureEffects[u.Arm] + (4+2*float64(len(u.Arm)%3))*rng.NormFloat64()
		postCell := strconv.FormatFloat(math.Round(post*100)/100, 'f', -1, 64)
		if rng.IntN(10) == 0 {
			postCell = ""
		}
		tab.Rows = append(tab.Rows, []string{u.RID, strconv.FormatFloat(math.Round(pre*100)/100, 'f', -1, 64), postCell, strconv.Itoa(rng.IntN(5))})
		tab.RowNumbers = append(tab.RowNumbers, i+2)
	}
	return units, tab
}

// writeRFixture writes what estimatr.R reads: one row per respondent with an
// outcome.
func writeRFixture(t *testing.T, path string, units []Unit, tab *Table, control []string) {
	t.Helper()
	var buf bytes.Buffer
	w := csv.NewWriter(&buf)
	w.Write([]string{"rid", "grp", "stratum", "age", "stance", "pre", "post"})
	for i, u := range units {
		row := tab.Rows[i]
		if row[2] == "" {
			continue
		}
		grp := u.Arm
		for _, c := range control {
			if c == u.Arm {
				grp = "control"
			}
		}
		w.Write([]string{u.RID, grp, u.Stratum, u.Covariates["age"], u.Covariates["stance"], row[1], row[2]})
	}
	w.Flush()
	if err := os.WriteFile(path, buf.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
}

// needTool finds a reference tool, or skips the test when it is absent and
// TRIALOGUE_REQUIRE_REFERENCE is unset (CI sets it, so CI never skips).
func needTool(t *testing.T, path string) string {
	t.Helper()
	p, err := exec.LookPath(path)
	if err != nil {
		if os.Getenv("TRIALOGUE_REQUIRE_REFERENCE") != "" {
			t.Fatalf("%s is required (TRIALOGUE_REQUIRE_REFERENCE is set) but not found: %v", path, err)
		}
		t.Skipf("%s not found; install it (see .ci/run) or set TRIALOGUE_REQUIRE_REFERENCE to fail instead", path)
	}
	return p
}

// needPython finds Debian's Python (/usr/bin/python3: the default python3
// may be another installation without Debian's packages) with the given
// modules, under the same rule as needTool.
func needPython(t *testing.T, modules ...string) string {
	t.Helper()
	python := needTool(t, "/usr/bin/python3")
	for _, m := range modules {
		if err := exec.Command(python, "-c", "import "+m).Run(); err != nil {
			if os.Getenv("TRIALOGUE_REQUIRE_REFERENCE") != "" {
				t.Fatalf("Python module %s is required (TRIALOGUE_REQUIRE_REFERENCE is set) but cannot be imported: %v", m, err)
			}
			t.Skipf("Python module %s is missing; install Debian's python3-%s or set TRIALOGUE_REQUIRE_REFERENCE to fail instead", m, m)
		}
	}
	return python
}
