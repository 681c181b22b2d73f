package store_test

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"slices"
	"strings"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/store"
)

// demoVariant parses the demo study with replacements, each of which must
// match once.
func demoVariant(tb testing.TB, pairs ...string) (*arms.Study, []byte) {
	tb.Helper()
	b, err := os.ReadFile("../testdata/demo-study.yaml")
	if err != nil {
		tb.Fatal(err)
	}
	src := string(b)
	for i := 0; i+1 < len(pairs); i += 2 {
		if n := strings.Count(src, pairs[i]); n != 1 {
			tb.Fatalf("demoVariant: %q occurs %d times, want 1", pairs[i], n)
		}
		src = strings.Replace(src, pairs[i], pairs[i+1], 1)
	}
	def, err := arms.Parse("demo variant", []byte(src))
	if err != nil {
		tb.Fatal(err)
	}
	return def, []byte(src)
}

// mustVariant opens a store with a variant of the demo study registered.
func mustVariant(tb testing.TB, pairs ...string) (*store.Store, *arms.Study, store.StudyVersion, store.Assigner) {
	tb.Helper()
	st := mustOpen(tb, "")
	def, src := demoVariant(tb, pairs...)
	sv, err := st.RegisterStudy(context.Background(), def, src)
	if err != nil {
		tb.Fatal(err)
	}
	return st, def, sv, assigner(tb, def, sv)
}

// lastRecord returns the latest chain record's kind and data.
func lastRecord(t *testing.T, st *store.Store, study string) (string, map[string]any) {
	t.Helper()
	recs, err := st.Chain(context.Background(), study)
	if err != nil {
		t.Fatal(err)
	}
	var c struct {
		Kind string         `json:"kind"`
		Data map[string]any `json:"data"`
	}
	if err := json.Unmarshal(recs[len(recs)-1].Content, &c); err != nil {
		t.Fatal(err)
	}
	return c.Kind, c.Data
}

func chainLen(t *testing.T, st *store.Store, study string) int {
	t.Helper()
	recs, err := st.Chain(context.Background(), study)
	if err != nil {
		t.Fatal(err)
	}
	return len(recs)
}

func mustPhase(t *testing.T, st *store.Store, study, want string) {
	t.Helper()
	got, err := st.Phase(context.Background(), study)
	if err != nil {
		t.Fatal(err)
	}
	if got != want {
		t.Fatalf("got phase %s, want %s", got, want)
	}
}

// TestPhases: the allowed changes happen and are logged with who, from, to
// and the version; the others are refused and change nothing.
func TestPhases(t *testing.T) {
	ctx := context.Background()
	st, def, sv, _ := mustDemo(t)
	by := store.Actor{UserID: 7}
	t.Run("OKDraftToPilotLogged", func(t *testing.T) {
		if err := st.ChangePhase(ctx, store.PhaseChange{Study: def.ID, From: store.PhaseDraft, To: store.PhasePilot, By: by}); err != nil {
			t.Fatal(err)
		}
		mustPhase(t, st, def.ID, store.PhasePilot)
		kind, data := lastRecord(t, st, def.ID)
		want := map[string]any{"from": "draft", "to": "pilot", "by": "user:7", "version": float64(1), "study_hash": sv.Hash}
		if kind != store.EventPhase || fmt.Sprint(data) != fmt.Sprint(want) {
			t.Errorf("got record %s %v, want %s %v", kind, data, store.EventPhase, want)
		}
	})
	refused := []struct {
		name string
		c    store.PhaseChange
		want func(error) bool
	}{
		{"ErrStaleFrom", store.PhaseChange{Study: def.ID, From: store.PhaseDraft, To: store.PhaseDraft}, func(err error) bool { return errors.Is(err, store.ErrConflict) }},
		{"ErrPilotToPilot", store.PhaseChange{Study: def.ID, From: store.PhasePilot, To: store.PhasePilot}, func(err error) bool { var pe *store.PhaseError; return errors.As(err, &pe) }},
		{"ErrNotAPhase", store.PhaseChange{Study: def.ID, From: store.PhasePilot, To: "paused"}, func(err error) bool { var pe *store.PhaseError; return errors.As(err, &pe) }},
		{"ErrLiveWithoutReviews", store.PhaseChange{Study: def.ID, From: store.PhasePilot, To: store.PhaseLive, Version: 1, MinReviewed: 1},
			func(err error) bool {
				var ie *store.InvalidError
				return errors.As(err, &ie) && strings.Contains(ie.Msg, "0 pilot transcript(s)")
			}},
		{"ErrLiveOlderVersion", store.PhaseChange{Study: def.ID, From: store.PhasePilot, To: store.PhaseLive, Version: 0}, func(err error) bool { return errors.Is(err, store.ErrConflict) }},
		{"ErrUnknownStudy", store.PhaseChange{Study: "no-such-study", To: store.PhaseClosed}, func(err error) bool { return errors.Is(err, store.ErrNotFound) }},
	}
	for _, c := range refused {
		t.Run(c.name, func(t *testing.T) {
			before := chainLen(t, st, def.ID)
			err := st.ChangePhase(ctx, c.c)
			if err == nil || !c.want(err) {
				t.Fatalf("got %v, want the refusal of %s", err, c.name)
			}
			mustPhase(t, st, def.ID, store.PhasePilot)
			if after := chainLen(t, st, def.ID); after != before {
				t.Errorf("got %d chain records, want %d: a refused change logged something", after, before)
			}
		})
	}
	t.Run("OKPilotToDraftAndBack", func(t *testing.T) {
		for _, c := range []struct{ from, to string }{{store.PhasePilot, store.PhaseDraft}, {store.PhaseDraft, store.PhasePilot}} {
			if err := st.ChangePhase(ctx, store.PhaseChange{Study: def.ID, From: c.from, To: c.to, By: by}); err != nil {
				t.Fatal(err)
			}
		}
		hist, err := st.PhaseHistory(ctx, def.ID)
		if err != nil {
			t.Fatal(err)
		}
		var got []string
		for _, h := range hist {
			got = append(got, h.From+">"+h.To)
		}
		if want := []string{"draft>pilot", "pilot>draft", "draft>pilot"}; !slices.Equal(got, want) {
			t.Errorf("got history %v, want %v", got, want)
		}
	})
	t.Run("OKLiveThenClosed", func(t *testing.T) {
		if err := st.ChangePhase(ctx, store.PhaseChange{Study: def.ID, From: store.PhasePilot, To: store.PhaseLive, Version: 1, By: by}); err != nil {
			t.Fatal(err)
		}
		s, err := st.State(ctx, def.ID)
		if err != nil {
			t.Fatal(err)
		}
		if s.Phase != store.PhaseLive || s.LiveVersion != 1 || s.LiveAt.IsZero() {
			t.Errorf("got %+v, want live with live version 1 and its time", s)
		}
		if err := st.ChangePhase(ctx, store.PhaseChange{Study: def.ID, From: store.PhaseLive, To: store.PhasePilot}); err == nil {
			t.Error("live to pilot: got no error, want a refusal")
		}
		if err := st.CloseStudy(ctx, def.ID); err != nil {
			t.Fatal(err)
		}
		if _, data := lastRecord(t, st, def.ID); data["by"] != "command-line" || data["from"] != "live" {
			t.Errorf("got close record %v, want from live by the command line", data)
		}
		if err := st.CloseStudy(ctx, def.ID); err != nil {
			t.Fatalf("closing twice: got %v, want nothing to do", err)
		}
		if r := check(t, st, def.ID); !r.OK() {
			t.Errorf("the chain does not verify after phase changes: %v %v", r.Chain, r.Mismatch)
		}
	})
}

// TestPilotEntries: entries before going live are pilot sessions; a pilot
// round takes at most its cap, counted from the round's start; live
// entries are main sessions.
func TestPilotEntries(t *testing.T) {
	ctx := context.Background()
	st, def, sv, as := mustVariant(t, "pilot_cap: 50", "pilot_cap: 2", "pilot_reviews: 3", "pilot_reviews: 1")
	enter := func(rid string) (store.Session, bool, error) {
		return st.Enter(ctx, sv, "lean=left", respondent(rid, "left"), as)
	}
	change := func(from, to string) {
		t.Helper()
		c := store.PhaseChange{Study: def.ID, From: from, To: to}
		if to == store.PhaseLive {
			c.Version = sv.Version
		}
		if err := st.ChangePhase(ctx, c); err != nil {
			t.Fatal(err)
		}
	}
	cohort := func(c store.Cohort) []string {
		t.Helper()
		rows, _, err := st.ListSessions(ctx, def.ID, store.SessionFilter{Cohort: c})
		if err != nil {
			t.Fatal(err)
		}
		var out []string
		for _, r := range rows {
			out = append(out, r.RID)
		}
		slices.Sort(out)
		return out
	}
	t.Run("OKDraftEntriesArePilotAndUncapped", func(t *testing.T) {
		for _, rid := range []string{"d1", "d2", "d3"} {
			if _, _, err := enter(rid); err != nil {
				t.Fatal(err)
			}
		}
		if got := cohort(store.CohortPilot); !slices.Equal(got, []string{"d1", "d2", "d3"}) {
			t.Errorf("got pilot sessions %v, want d1 d2 d3", got)
		}
	})
	change(store.PhaseDraft, store.PhasePilot)
	t.Run("OKUpToTheCap", func(t *testing.T) {
		for _, rid := range []string{"p1", "p2"} {
			if _, _, err := enter(rid); err != nil {
				t.Fatalf("%s: %v", rid, err)
			}
		}
		if n, _, err := st.PilotRound(ctx, def.ID); err != nil || n != 2 {
			t.Errorf("got round count %d, %v; want 2", n, err)
		}
	})
	t.Run("ErrPilotFull", func(t *testing.T) {
		if _, _, err := enter("p3"); !errors.Is(err, store.ErrPilotFull) {
			t.Fatalf("got %v, want ErrPilotFull", err)
		}
		if _, err := st.SessionByRID(ctx, def.ID, "p3"); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("got %v, want no session for the refused respondent", err)
		}
	})
	t.Run("OKReturningRespondentOfFullPilot", func(t *testing.T) {
		if _, created, err := enter("p1"); err != nil || created {
			t.Errorf("got created %v, %v; want the old session", created, err)
		}
	})
	t.Run("OKNewRoundRestartsTheCount", func(t *testing.T) {
		change(store.PhasePilot, store.PhaseDraft)
		change(store.PhaseDraft, store.PhasePilot)
		if _, _, err := enter("q1"); err != nil {
			t.Fatalf("new round: %v", err)
		}
	})
	t.Run("OKLiveEntriesAreMain", func(t *testing.T) {
		q1, err := st.SessionByRID(ctx, def.ID, "q1")
		if err != nil {
			t.Fatal(err)
		}
		if _, err := st.Review(ctx, def.ID, store.ReviewAction{Session: q1.ID, Action: store.ReviewMark}); err != nil {
			t.Fatal(err)
		}
		change(store.PhasePilot, store.PhaseLive)
		for _, rid := range []string{"m1", "m2", "m3"} {
			if _, _, err := enter(rid); err != nil {
				t.Fatal(err)
			}
		}
		if got := cohort(store.CohortMain); !slices.Equal(got, []string{"m1", "m2", "m3"}) {
			t.Errorf("got main sessions %v, want m1 m2 m3", got)
		}
	})
}

// TestLiveFreezesDesign: once live, a file that changes prompts, models or
// design is refused with the reason and registers nothing; other changes
// make a new version.
func TestLiveFreezesDesign(t *testing.T) {
	ctx := context.Background()
	st, def, sv, _ := mustDemo(t)
	for _, c := range []store.PhaseChange{{Study: def.ID, To: store.PhasePilot}, {Study: def.ID, To: store.PhaseLive, Version: sv.Version}} {
		if err := st.ChangePhase(ctx, c); err != nil {
			t.Fatal(err)
		}
	}
	t.Run("ErrChangedPrompt", func(t *testing.T) {
		changed, src := demoVariant(t, "politely and with facts", "forcefully", "temperature: 0.7", "temperature: 0.9")
		_, err := st.RegisterStudy(ctx, changed, src)
		var fe *store.FrozenError
		if !errors.As(err, &fe) {
			t.Fatalf("got %v, want a FrozenError", err)
		}
		if len(fe.Changes) != 1 || !strings.HasPrefix(fe.Changes[0], "arms.debate.system") || fe.LiveVersion != 1 {
			t.Errorf("got changes %q of live version %d, want arms.debate.system of 1 (the hosted endpoint serves no arm)", fe.Changes, fe.LiveVersion)
		}
		if v, err := st.Versions(ctx, def.ID); err != nil || len(v) != 1 {
			t.Errorf("got %d versions, %v; want 1", len(v), err)
		}
	})
	t.Run("OKChangedPageText", func(t *testing.T) {
		changed, src := demoVariant(t, "Please continue to return to the survey.\"", "Please continue back to the survey.\"")
		v, err := st.RegisterStudy(ctx, changed, src)
		if err != nil {
			t.Fatal(err)
		}
		if v.Version != 2 {
			t.Errorf("got version %d, want 2", v.Version)
		}
	})
}

func TestEthicsRef(t *testing.T) {
	ctx := context.Background()
	st, def, _, _ := mustDemo(t)
	by := store.Actor{UserID: 3}
	t.Run("OK", func(t *testing.T) {
		if err := st.SetEthicsRef(ctx, def.ID, "  Board of Fictional Studies 2027-114  ", by); err != nil {
			t.Fatal(err)
		}
		s, err := st.State(ctx, def.ID)
		if err != nil {
			t.Fatal(err)
		}
		if s.EthicsRef != "Board of Fictional Studies 2027-114" {
			t.Errorf("got %q, want the reference trimmed", s.EthicsRef)
		}
		if kind, data := lastRecord(t, st, def.ID); kind != store.EventEthics || data["ref"] != s.EthicsRef || data["by"] != "user:3" {
			t.Errorf("got record %s %v, want the ethics reference by user:3", kind, data)
		}
	})
	for _, c := range []struct{ name, ref string }{{"ErrEmpty", "  "}, {"ErrLineBreak", "A\nB"}, {"ErrTooLong", strings.Repeat("x", 201)}} {
		t.Run(c.name, func(t *testing.T) {
			before := chainLen(t, st, def.ID)
			var ie *store.InvalidError
			if err := st.SetEthicsRef(ctx, def.ID, c.ref, by); !errors.As(err, &ie) {
				t.Fatalf("got %v, want an InvalidError", err)
			}
			if s, _ := st.State(ctx, def.ID); s.EthicsRef != "Board of Fictional Studies 2027-114" || chainLen(t, st, def.ID) != before {
				t.Errorf("a refused reference changed something: %q", s.EthicsRef)
			}
		})
	}
}

// TestClosedFor: how long a study has been closed, for the grace period.
func TestClosedFor(t *testing.T) {
	at := time.Date(2027, 3, 1, 12, 0, 0, 0, time.UTC)
	for _, c := range []struct {
		name  string
		st    store.StudyState
		d     time.Duration
		isSet bool
	}{
		{"OKOpen", store.StudyState{Phase: store.PhaseLive}, 0, false},
		{"OKClosed", store.StudyState{Phase: store.PhaseClosed, ClosedAt: at}, 90 * time.Minute, true},
	} {
		t.Run(c.name, func(t *testing.T) {
			d, ok := c.st.ClosedFor(at.Add(90 * time.Minute))
			if d != c.d || ok != c.isSet {
				t.Errorf("got %s %v, want %s %v", d, ok, c.d, c.isSet)
			}
		})
	}
}
