package store_test

import (
	"context"
	"errors"
	"slices"
	"testing"
	"time"

	"trialogue/store"
)

// TestMonitor: the monitor's snapshot of a cohort: sessions with their
// last activity, tokens per arm, latencies, and the last hour's retries and
// failures.
func TestMonitor(t *testing.T) {
	ctx := context.Background()
	st, def, sv, as := mustDemo(t)
	clock := time.Date(2027, 6, 1, 10, 0, 0, 0, time.UTC)
	st.Now = func() time.Time { return clock }
	allow := func([]store.Turn, bool) error { return nil }
	// Two sessions: the first answered twice two hours ago, the second once
	// now with a retry, then a failed call.
	var sessions []store.Session
	for _, rid := range []string{"mon-1", "mon-2"} {
		s, _, err := st.Enter(ctx, sv, "lean=centre", respondent(rid, "centre"), as)
		if err != nil {
			t.Fatal(err)
		}
		sessions = append(sessions, s)
	}
	turn := func(s store.Session, latency int64, retries, in, out int) {
		t.Helper()
		a, err := st.AddReply(ctx, s, "a reply of some words", "", allow)
		if err != nil {
			t.Fatal(err)
		}
		if _, err := st.AddModelTurn(ctx, store.Turn{SessionID: s.ID, Index: a.Turn.Index + 1, Text: "an answer", StartedAt: clock,
			LatencyMS: latency, Retries: retries, PromptTokens: in, CompletionTokens: out, StudyHash: s.StudyHash}); err != nil {
			t.Fatal(err)
		}
	}
	turn(sessions[0], 900, 0, 100, 20)
	turn(sessions[0], 300, 1, 150, 30)
	clock = clock.Add(2 * time.Hour)
	turn(sessions[1], 600, 2, 50, 10)
	if err := st.RecordFailure(ctx, sessions[1].ID, "server_error", 503, 4); err != nil {
		t.Fatal(err)
	}
	if _, err := st.Finish(ctx, sessions[1].ID); err != nil {
		t.Fatal(err)
	}
	t.Run("OKPilot", func(t *testing.T) {
		snap, err := st.Monitor(ctx, def.ID, store.CohortPilot, clock.Add(-time.Hour))
		if err != nil {
			t.Fatal(err)
		}
		if len(snap.Sessions) != 2 {
			t.Fatalf("got %d sessions, want 2", len(snap.Sessions))
		}
		first, second := snap.Sessions[0], snap.Sessions[1]
		if first.Finished || !first.LastActivity.Equal(clock.Add(-2*time.Hour)) || !second.Finished || !second.LastActivity.Equal(clock) {
			t.Errorf("got %+v and %+v, want the first unfinished, last active two hours ago, the second finished and active now", first, second)
		}
		if !slices.Equal(snap.Latencies, []int64{300, 600, 900}) || !slices.Equal(snap.HourLatencies, []int64{600}) {
			t.Errorf("got latencies %v and %v in the hour, want [300 600 900] and [600]", snap.Latencies, snap.HourLatencies)
		}
		if snap.HourRetries != 2 || snap.HourFailures != 1 {
			t.Errorf("got %d retries and %d failures in the hour, want 2 and 1", snap.HourRetries, snap.HourFailures)
		}
		var in, out int64
		for _, u := range snap.Tokens {
			in += u.Input
			out += u.Output
		}
		if in != 300 || out != 60 {
			t.Errorf("got %d and %d tokens, want 300 in and 60 out", in, out)
		}
	})
	t.Run("OKMainIsEmpty", func(t *testing.T) {
		snap, err := st.Monitor(ctx, def.ID, store.CohortMain, clock.Add(-time.Hour))
		if err != nil {
			t.Fatal(err)
		}
		if len(snap.Sessions) != 0 || len(snap.Latencies) != 0 || snap.HourFailures != 0 {
			t.Errorf("got %+v, want nothing in the main cohort before going live", snap)
		}
	})
	t.Run("ErrCohort", func(t *testing.T) {
		var ie *store.InvalidError
		if _, err := st.Monitor(ctx, def.ID, "most", clock); !errors.As(err, &ie) {
			t.Errorf("got %v, want an InvalidError", err)
		}
	})
}
