package main

import (
	"context"
	"encoding/json"
	"path/filepath"
	"strings"
	"testing"

	"trialogue/arms"
	"trialogue/arms/drift"
	"trialogue/arms/responder"
	"trialogue/server"
	"trialogue/store"
)

// TestDrift: with the scripted responder every check passes run after run;
// with a scripted responder whose replies were changed between runs (as a
// hosted model can change under the same name) the check fails.
func TestDrift(t *testing.T) {
	ctx := context.Background()
	def, src, err := arms.ParseFile(fastDemo(t))
	if err != nil {
		t.Fatal(err)
	}
	db := filepath.Join(t.TempDir(), "d.db")
	st, err := store.Open(ctx, db, store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	defer st.Close()
	sv, err := st.RegisterStudy(ctx, def, src)
	if err != nil {
		t.Fatal(err)
	}
	rs, err := server.Responders(def, func(string) string { return "" })
	if err != nil {
		t.Fatal(err)
	}
	first, err := driftCheck(ctx, st, def, sv, rs, 0)
	if err != nil {
		t.Fatal(err)
	}
	// 1 probe × (tailored: 1 message; debate: opening + 3; reflect: 3; chit-chat: 3) × 3 runs
	if !first.Baseline || first.Status != "baseline" || len(first.Outputs) != 3*(1+4+3+3) {
		t.Fatalf("first run: baseline %v status %s outputs %d", first.Baseline, first.Status, len(first.Outputs))
	}
	second, err := driftCheck(ctx, st, def, sv, rs, 0)
	if err != nil {
		t.Fatal(err)
	}
	if second.Baseline || second.Status != drift.Pass {
		t.Fatalf("unchanged responder: got %s\n%s", second.Status, second.Report)
	}
	t.Run("ErrChangedResponder", func(t *testing.T) {
		changed := map[string]responder.Responder{"offline": responder.NewScripted(responder.ScriptedConfig{
			Fallback: []string{"Gardening is lovely in spring. Do you grow tomatoes or beans on your balcony this year?"},
			Model:    "scripted"})}
		run, err := driftCheck(ctx, st, def, sv, changed, 0)
		if err != nil {
			t.Fatal(err)
		}
		var rep driftReport
		if err := json.Unmarshal([]byte(run.Report), &rep); err != nil {
			t.Fatal(err)
		}
		if run.Status != drift.Fail || rep.VsBaseline == nil || rep.VsBaseline.Status != drift.Fail || rep.VsPrevious == nil {
			t.Fatalf("changed responder: got %s\n%s", run.Status, run.Report)
		}
	})
	t.Run("OKCommand", func(t *testing.T) {
		st.Close()
		code, out := runCmd(t, "drift", "--db", db, "--study", "quillhaven-cable-car", "--runs", "3")
		// the latest run (the changed one) is not the reference; the baseline is
		if code != exitOK || !strings.Contains(out, "against the baseline: pass") {
			t.Fatalf("got exit %d:\n%s", code, out)
		}
	})
	t.Run("ErrUsage", func(t *testing.T) {
		if code, _ := runCmd(t, "drift", "--db", db, "--study", "no-such-study"); code != exitUsage {
			t.Fatalf("unknown study: got exit %d, want %d", code, exitUsage)
		}
		if code, _ := runCmd(t, "drift", "--db", db, "--study", "quillhaven-cable-car", "--runs", "1000"); code != exitUsage {
			t.Fatalf("too many runs: got exit %d, want %d", code, exitUsage)
		}
	})
}
