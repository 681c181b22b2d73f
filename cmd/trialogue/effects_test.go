package main

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/store"
)

// plantedEffects are added to the outcome of each demo arm.
var plantedEffects = map[string]float64{"notice": 0, "chit-chat": 0, "letter": 3, "tailored": 0, "debate": 6, "reflect": 0}

// plantedStudy enters n fictional respondents into the demo study through
// the store, as the server does (the study's own seed and allocation plan),
// finishes most of them, and writes an outcome file as a survey platform in
// a semicolon locale would: byte-order mark, semicolons, decimal commas,
// quoted headers, empty cells for respondents who left.
func plantedStudy(t *testing.T, n int) (db, outcomes string) {
	t.Helper()
	ctx := context.Background()
	dir := t.TempDir()
	db = filepath.Join(dir, "planted.db")
	st, err := store.Open(ctx, db, store.Options{Synchronous: "NORMAL"})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	def, src, err := arms.ParseFile(demoStudy)
	if err != nil {
		t.Fatal(err)
	}
	sv, err := st.RegisterStudy(ctx, def, src)
	if err != nil {
		t.Fatal(err)
	}
	plan, err := assign.NewPlan(sv.Seed, def.Scheme())
	if err != nil {
		t.Fatal(err)
	}
	assigner := func(stratum string, slot int) (string, string) {
		a := plan.Slot(stratum, slot).Arm
		return a, def.Arms[a].Code
	}
	rng := rand.New(rand.NewPCG(5, 2027))
	var buf bytes.Buffer
	buf.WriteString("\ufeff\"Response ID\";\"attitude_pre\";\"attitude_post\";\"duration\"\r\n")
	for i := range n {
		r := arms.Respondent{RID: fmt.Sprintf("QH-%05d", i), Covariates: map[string]string{
			"age":    strconv.Itoa(18 + rng.IntN(70)),
			"lean":   []string{"left", "centre", "right"}[rng.IntN(3)],
			"stance": []string{"favour", "against", "unsure"}[rng.IntN(3)],
		}}
		sess, _, err := st.Enter(ctx, sv, def.StratumKey(r), r, assigner)
		if err != nil {
			t.Fatal(err)
		}
		if rng.IntN(10) != 0 {
			if _, err := st.Finish(ctx, sess.ID); err != nil {
				t.Fatal(err)
			}
		}
		pre := 50 + 10*rng.NormFloat64()
		post := 10 + 0.8*pre + plantedEffects[sess.Arm] + 5*rng.NormFloat64()
		postCell := strings.Replace(strconv.FormatFloat(math.Round(post*10)/10, 'f', 1, 64), ".", ",", 1)
		if rng.IntN(12) == 0 {
			postCell = ""
		}
		fmt.Fprintf(&buf, "%s;%s;%s;%d\r\n", r.RID, strings.Replace(strconv.FormatFloat(math.Round(pre*10)/10, 'f', 1, 64), ".", ",", 1), postCell, 300+rng.IntN(600))
	}
	outcomes = filepath.Join(dir, "survey-export.csv")
	if err := os.WriteFile(outcomes, buf.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
	return db, outcomes
}

// TestEffectsPlanted is the end-to-end check: on the demo study with a
// planted effect, trialogue effects recovers it.
func TestEffectsPlanted(t *testing.T) {
	db, outcomes := plantedStudy(t, 900)
	out := filepath.Join(t.TempDir(), "out")
	base := []string{"effects", "--db", db, "--study", "quillhaven-cable-car", "--outcomes", outcomes, "--id", "Response ID",
		"--outcome", "attitude_post", "--control", "notice,chit-chat"}
	t.Run("OKRecoversPlantedEffect", func(t *testing.T) {
		var stdout, stderr bytes.Buffer
		args := append(append([]string{}, base...), "--pre", "attitude_pre", "--adjust", "lin", "--covariates", "age,stance", "--permutations", "500", "--out", out)
		if code := run(context.Background(), args, &stdout, &stderr); code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, stderr.String())
		}
		for _, want := range []string{"Study quillhaven-cable-car, outcome attitude_post, adjustment lin, stratum fixed effects", "control (pooled)", "debate", "Differential attrition: chi-square"} {
			if !strings.Contains(stdout.String(), want) {
				t.Errorf("terminal table lacks %q:\n%s", want, stdout.String())
			}
		}
		b, err := os.ReadFile(filepath.Join(out, "effects.json"))
		if err != nil {
			t.Fatal(err)
		}
		var raw struct {
			Reports []struct {
				Effects []map[string]any `json:"effects"`
			} `json:"reports"`
		}
		if err := json.Unmarshal(b, &raw); err != nil {
			t.Fatal(err)
		}
		got := map[string]map[string]any{}
		for _, e := range raw.Reports[0].Effects {
			got[e["arm"].(string)] = e
		}
		for arm, effect := range plantedEffects {
			if arm == "notice" || arm == "chit-chat" {
				continue
			}
			e, ok := got[arm]
			if !ok {
				t.Fatalf("no effect for arm %s", arm)
			}
			// The study's allocation seed is drawn afresh at registration, so
			// the assignment differs run to run: hold the estimate to within
			// four standard errors of the planted effect (a miss has
			// probability about 6e-5 per arm under the normal approximation),
			// not to the 95% interval, which misses one arm in five runs.
			est, se := e["estimate"].(float64), e["se"].(float64)
			if math.Abs(est-effect) > 4*se {
				t.Errorf("%s: estimate %v (SE %v) is more than 4 SE from the planted effect %v", arm, est, se, effect)
			}
			if effect > 0 && (e["p_holm"].(float64) > 0.01 || e["p_ri"].(float64) > 0.01) {
				t.Errorf("%s: planted effect %v not detected: p_holm %v, p_ri %v", arm, effect, e["p_holm"], e["p_ri"])
			}
		}
		for _, name := range []string{"effects.csv", "balance.csv", "attrition.csv", "effects.svg"} {
			b, err := os.ReadFile(filepath.Join(out, name))
			if err != nil || len(b) == 0 {
				t.Errorf("%s: got %d bytes, error %v; want a file", name, len(b), err)
			}
		}
		svg, _ := os.ReadFile(filepath.Join(out, "effects.svg"))
		for _, want := range []string{"<svg", "debate", "letter", "Effects against the pooled control"} {
			if !bytes.Contains(svg, []byte(want)) {
				t.Errorf("effects.svg lacks %q", want)
			}
		}
	})
	t.Run("OKExcludeFlagged", func(t *testing.T) {
		// Thirty respondents answer in one word: each is flagged as satisficing.
		ctx := context.Background()
		st, err := store.Open(ctx, db, store.Options{})
		if err != nil {
			t.Fatal(err)
		}
		sessions, err := st.Sessions(ctx, "quillhaven-cable-car")
		if err != nil {
			t.Fatal(err)
		}
		for _, sess := range sessions[:30] {
			if _, err := st.AddReply(ctx, sess, "ok", "short", func([]store.Turn, bool) error { return nil }); err != nil {
				t.Fatal(err)
			}
		}
		st.Close()
		var stdout, stderr bytes.Buffer
		args := append(append([]string{}, base...), "--exclude-flagged", "--permutations", "0")
		if code := run(context.Background(), args, &stdout, &stderr); code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, stderr.String())
		}
		if want := "Left out 30 of 900 respondents whose transcripts are flagged (satisficed 30)"; !strings.Contains(stdout.String(), want) {
			t.Fatalf("got %.300q, want it to say %q", stdout.String(), want)
		}
	})
	bad := []struct {
		name string
		args []string
		want string
	}{
		{"ErrUnknownControl", []string{"--control", "notice,placebo"}, `control arm "placebo" does not exist`},
		{"ErrNonNumericColumn", []string{"--outcome", "Response ID"}, `column "Response ID" has cells that are not numbers: row 2 ("QH-00000")`},
		{"ErrUnknownStudy", []string{"--study", "no-such-study"}, `study "no-such-study" is not in`},
		{"ErrMissingFlags", nil, "missing"},
	}
	for _, c := range bad {
		t.Run(c.name, func(t *testing.T) {
			args := append(append([]string{}, base...), c.args...)
			if c.args == nil {
				args = []string{"effects", "--db", db}
			}
			args = append(args, "--permutations", "0")
			var stdout, stderr bytes.Buffer
			if code := run(context.Background(), args, &stdout, &stderr); code != exitUsage || !strings.Contains(stderr.String(), c.want) {
				t.Fatalf("got exit %d and stderr %q; want exit 2 and %q", code, stderr.String(), c.want)
			}
			if stdout.Len() != 0 {
				t.Errorf("bad input printed results: %s", stdout.String())
			}
		})
	}
}
