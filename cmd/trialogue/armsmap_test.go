package main

import (
	"bytes"
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/arms/assign"
	"trialogue/store"
)

// TestArmsMap stores model turns for the demo study's model arms (their
// scripted texts, as the offline responder writes them) and maps them.
func TestArmsMap(t *testing.T) {
	ctx := context.Background()
	db := filepath.Join(t.TempDir(), "map.db")
	st, err := store.Open(ctx, db, store.Options{Synchronous: "NORMAL"})
	if err != nil {
		t.Fatal(err)
	}
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
	for i := range 120 {
		r := arms.Respondent{RID: fmt.Sprintf("M-%d", i), Covariates: map[string]string{"age": "40", "lean": []string{"left", "centre", "right"}[i%3], "stance": "unsure"}}
		sess, _, err := st.Enter(ctx, sv, def.StratumKey(r), r, assigner)
		if err != nil {
			t.Fatal(err)
		}
		script := def.Arms[sess.Arm].Script
		for k := 0; k < len(script) && k < 3; k++ {
			now := time.Now()
			if _, err := st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: k, Text: script[(i+k)%len(script)], StartedAt: now, StudyHash: sv.Hash}); err != nil {
				t.Fatal(err)
			}
		}
	}
	st.Close()
	out := filepath.Join(t.TempDir(), "map")
	t.Run("OK", func(t *testing.T) {
		var stdout, stderr bytes.Buffer
		code := run(ctx, []string{"arms-map", "--db", db, "--study", "quillhaven-cable-car", "--permutations", "99", "--out", out}, &stdout, &stderr)
		if code != exitOK {
			t.Fatalf("got exit %d, want 0; stderr: %s", code, stderr.String())
		}
		for _, want := range []string{"model messages from", "accuracy", "Cosine distance between arm centroids", "chit-chat:"} {
			if !strings.Contains(stdout.String(), want) {
				t.Errorf("output lacks %q:\n%s", want, stdout.String())
			}
		}
		for _, name := range []string{"armsmap.svg", "armsmap-points.csv", "armsmap-distances.csv", "armsmap-terms.csv", "armsmap-summary.csv"} {
			if b, err := os.ReadFile(filepath.Join(out, name)); err != nil || len(b) == 0 {
				t.Errorf("%s: got %d bytes, error %v", name, len(b), err)
			}
		}
		svg, _ := os.ReadFile(filepath.Join(out, "armsmap.svg"))
		// The legend names each model arm; the fixed arms wrote nothing.
		for _, arm := range []string{"tailored", "debate", "reflect", "chit-chat"} {
			if !bytes.Contains(svg, []byte(arm)) {
				t.Errorf("armsmap.svg lacks the legend entry %q", arm)
			}
		}
	})
	t.Run("ErrUnknownStudy", func(t *testing.T) {
		var stdout, stderr bytes.Buffer
		if code := run(ctx, []string{"arms-map", "--db", db, "--study", "nope"}, &stdout, &stderr); code != exitUsage || !strings.Contains(stderr.String(), `study "nope" is not in`) {
			t.Fatalf("got exit %d, stderr %q; want 2 and the study named", code, stderr.String())
		}
	})
}
