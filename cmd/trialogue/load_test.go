package main

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/server/simulate"
	"trialogue/store"
)

// loadRespondents is how many synthetic respondents TestLoad sends at once:
// enough that replies, stream writes and durable commits overlap heavily,
// few enough that the run takes about 15 s on two cores. README's load
// figures use 1,000 with the same study.
const loadRespondents = 300

// TestLoad starts the real server on the load study (one chat arm of six
// replies per respondent, the scripted model streaming 40 chunks over 2 s
// per reply), drives loadRespondents synthetic respondents through the
// real HTTP path at once with the simulate client, and then checks the
// database: every respondent finished with no error, each of their six
// acknowledged replies is stored once, in order, followed by its model
// turn, no turn is duplicated, no allocation slot is repeated or skipped,
// and the audit (hash chain, sessions and turns against their records, the
// allocation) passes. Latencies, the server's own overhead per turn and its
// peak memory are logged, never asserted: speed is for README's figures.
func TestLoad(t *testing.T) {
	if testing.Short() {
		t.Skip("builds the binary and runs 300 respondents for about 15 s")
	}
	bin := trialogueBinary(t)
	studyPath, err := filepath.Abs(filepath.Join("..", "..", "testdata", "personas", "load-study.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	def, _, err := arms.ParseFile(studyPath)
	if err != nil {
		t.Fatal(err)
	}
	const key = "load-test-synthetic-key"
	t.Setenv("TRIALOGUE_SYNTHETIC_KEY", key)
	db := filepath.Join(t.TempDir(), "load.db")
	p := startProc(t, bin, "serve", "--study", studyPath, "--db", db, "--addr", "127.0.0.1:0",
		"--entry-rate", "0", "--reply-rate", "0")

	// A bound on the run, far above its usual 15 s, so that a stuck server
	// fails the test instead of hanging it; it is not a timing check.
	rep, err := simulate.Run(context.Background(), simulate.Config{
		URL: p.base, Study: def.ID, Respondents: loadRespondents, Concurrency: loadRespondents,
		Personas: simulate.FromStudy(def), SyntheticKey: key, MaxTime: 5 * time.Minute, Seed: 7, RIDPrefix: "load-",
	})
	if err != nil {
		t.Fatal(err)
	}
	peak := procStatus(t, p.cmd.Process.Pid, "VmHWM")
	reply := rep.Steps["reply"]
	t.Logf("%d respondents at once: %d completed in %.1f s, %d model turns, errors %v", loadRespondents, rep.Completed, rep.Seconds, rep.Turns, rep.Errors)
	t.Logf("reply, whole turn: p50 %.0f ms, p90 %.0f ms, p99 %.0f ms, max %.0f ms", reply.P50, reply.P90, reply.P99, reply.Max)
	t.Logf("server overhead per turn, server's clock: p50 %.1f ms, p90 %.1f ms, p99 %.1f ms, max %.1f ms",
		rep.ServerSide.P50, rep.ServerSide.P90, rep.ServerSide.P99, rep.ServerSide.Max)
	t.Logf("overhead per turn, client's clock: p50 %.1f ms, p99 %.1f ms", rep.Overhead.P50, rep.Overhead.P99)
	t.Logf("server peak resident memory (VmHWM): %s", peak)
	if rep.Stopped {
		t.Fatalf("the run hit its %s bound before every respondent finished", 5*time.Minute)
	}
	if n := rep.ErrorCount(); n > 0 {
		t.Errorf("errors: got %d (%v), want none", n, rep.Errors)
	}
	if rep.Completed != loadRespondents {
		t.Errorf("completed: got %d, want %d", rep.Completed, loadRespondents)
	}
	replies := def.Arms[def.ArmOrder[0]].RepliesOf().Max
	if want := loadRespondents * replies; rep.Turns != want || rep.ServerSide.Count != want {
		t.Errorf("model turns received: got %d (%d with server_ms), want %d", rep.Turns, rep.ServerSide.Count, want)
	}

	if err := p.cmd.Process.Signal(syscall.SIGTERM); err != nil {
		t.Fatal(err)
	}
	<-p.exited
	if p.err != nil {
		t.Fatalf("server on SIGTERM: got %v, want exit 0\n%s", p.err, p.stderr.String())
	}
	checkLoadDatabase(t, db, def, replies)
}

// checkLoadDatabase reads what the load run stored.
func checkLoadDatabase(t *testing.T, db string, def *arms.Study, replies int) {
	t.Helper()
	ctx := context.Background()
	st, plan, sessions := readBack(t, db, def)
	if len(sessions) != loadRespondents {
		t.Fatalf("sessions: got %d, want %d (one per respondent)", len(sessions), loadRespondents)
	}
	slots := map[string][]int{}
	rids := map[string]bool{}
	for _, s := range sessions {
		if rids[s.RID] {
			t.Errorf("respondent %s has two sessions", s.RID)
		}
		rids[s.RID] = true
		slots[s.Stratum] = append(slots[s.Stratum], s.Slot)
		if want := plan.Slot(s.Stratum, s.Slot).Arm; s.Arm != want {
			t.Errorf("session %s: got arm %s, want %s from the allocation sequence", s.RID, s.Arm, want)
		}
		if !s.Finished() {
			t.Errorf("session %s: not finished", s.RID)
		}
		turns, err := st.Turns(ctx, s.ID)
		if err != nil {
			t.Fatal(err)
		}
		if err := checkLoadTurns(turns, def.Arms[s.Arm].Script, replies); err != nil {
			t.Errorf("session %s (arm %s): %v", s.RID, s.Arm, err)
		}
	}
	for stratum, got := range slots {
		slices.Sort(got)
		for i, s := range got {
			if s != i {
				t.Fatalf("stratum %s: slots %v, want 0..%d with none repeated or skipped", stratum, got, len(got)-1)
			}
		}
	}
	ds, err := st.LoadDataset(ctx, def.ID)
	if err != nil {
		t.Fatal(err)
	}
	if r := ds.Check(); !r.OK() {
		t.Errorf("audit of the stored study: chain %v, mismatches %v, allocation %v", r.Chain, r.Mismatch, r.Allocated)
	}
}

// checkLoadTurns checks one session's turns: reply i (client id s<i>, as
// the simulate client numbers its sends) at index 2i, stored once, and the
// script's answer i right after it.
func checkLoadTurns(turns []store.Turn, script []string, replies int) error {
	if len(turns) != 2*replies {
		return fmt.Errorf("got %d turns, want %d (each reply and its answer, once)", len(turns), 2*replies)
	}
	for i, tn := range turns {
		if tn.Index != i {
			return fmt.Errorf("turn %d has index %d", i, tn.Index)
		}
		n := i / 2
		if i%2 == 0 {
			if tn.Role != store.RoleRespondent || tn.ClientID != "s"+strconv.Itoa(n) {
				return fmt.Errorf("turn %d: got %s with client id %q, want reply s%d", i, tn.Role, tn.ClientID, n)
			}
			continue
		}
		if tn.Role != store.RoleAssistant || tn.Text != script[n%len(script)] {
			return fmt.Errorf("turn %d: got %s %q, want the model's answer %q", i, tn.Role, tn.Text, script[n%len(script)])
		}
	}
	return nil
}

// procStatus reads one field of /proc/PID/status (Linux's proc(5)), such
// as VmHWM, the peak resident set size; "unknown" where there is none.
func procStatus(t *testing.T, pid int, field string) string {
	t.Helper()
	b, err := os.ReadFile(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return "unknown"
	}
	for line := range strings.Lines(string(b)) {
		if v, ok := strings.CutPrefix(line, field+":"); ok {
			return strings.TrimSpace(v)
		}
	}
	return "unknown"
}

// TestCheckLoadTurns holds TestLoad's check of one session to the faults it
// must catch.
func TestCheckLoadTurns(t *testing.T) {
	script := []string{"one", "two"}
	good := func() []store.Turn {
		var ts []store.Turn
		for n := range 2 {
			ts = append(ts, store.Turn{Index: 2 * n, Role: store.RoleRespondent, ClientID: "s" + strconv.Itoa(n)},
				store.Turn{Index: 2*n + 1, Role: store.RoleAssistant, Text: script[n]})
		}
		return ts
	}
	if err := checkLoadTurns(good(), script, 2); err != nil {
		t.Fatalf("OK: got %v, want nil", err)
	}
	for _, c := range []struct {
		name  string
		spoil func([]store.Turn) []store.Turn
	}{
		{"ErrReplyStoredTwice", func(ts []store.Turn) []store.Turn { ts[2].ClientID = "s0"; return ts }},
		{"ErrAnswerMissing", func(ts []store.Turn) []store.Turn { return ts[:3] }},
		{"ErrExtraTurn", func(ts []store.Turn) []store.Turn {
			return append(ts, store.Turn{Index: 4, Role: store.RoleAssistant, Text: "one"})
		}},
		{"ErrIndexSkipped", func(ts []store.Turn) []store.Turn { ts[3].Index = 4; return ts }},
		{"ErrWrongAnswer", func(ts []store.Turn) []store.Turn { ts[3].Text = "one"; return ts }},
	} {
		t.Run(c.name, func(t *testing.T) {
			if err := checkLoadTurns(c.spoil(good()), script, 2); err == nil {
				t.Fatal("got nil, want an error")
			}
		})
	}
}
