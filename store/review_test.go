package store_test

import (
	"context"
	"errors"
	"slices"
	"strings"
	"testing"

	"trialogue/arms/codes"
	"trialogue/store"
)

// TestReview: each decision is kept, logged in the chain with the hash of
// its text, and never deletes anything; bad decisions change nothing.
func TestReview(t *testing.T) {
	ctx := context.Background()
	st, def, sv, as := mustDemo(t)
	u, err := st.AddUser(ctx, "ines@example.org", store.RoleOwner, testPassword, false)
	if err != nil {
		t.Fatal(err)
	}
	by := store.Actor{UserID: u.ID}
	sess, _, err := st.Enter(ctx, sv, "lean=left", respondent("rev-1", "left"), as)
	if err != nil {
		t.Fatal(err)
	}
	do := func(action, text string) store.Review {
		t.Helper()
		r, err := st.Review(ctx, def.ID, store.ReviewAction{Session: sess.ID, Action: action, Text: text, By: by})
		if err != nil {
			t.Fatal(err)
		}
		return r
	}
	t.Run("OKMarkReviewed", func(t *testing.T) {
		r := do(store.ReviewMark, "")
		if !r.Reviewed || r.ByEmail != "ines@example.org" || r.At.IsZero() {
			t.Errorf("got %+v, want reviewed by ines@example.org with a time", r)
		}
		kind, data := lastRecord(t, st, def.ID)
		if kind != store.EventReview || data["action"] != "reviewed" || data["by"] != by.String() || data["session"] != float64(sess.ID) {
			t.Errorf("got record %s %v, want the review of session %d", kind, data, sess.ID)
		}
	})
	t.Run("OKMarkAgainChangesNothing", func(t *testing.T) {
		before := chainLen(t, st, def.ID)
		do(store.ReviewMark, "")
		if chainLen(t, st, def.ID) != before {
			t.Error("marking a reviewed session again logged a record")
		}
	})
	t.Run("OKNote", func(t *testing.T) {
		r := do(store.ReviewNote, "  The model kept to its side.  ")
		if r.Note != "The model kept to its side." || !r.Reviewed {
			t.Errorf("got %+v, want the trimmed note and still reviewed", r)
		}
		if _, data := lastRecord(t, st, def.ID); data["text_sha256"] != codes.SHA256Hex([]byte(r.Note)) {
			t.Errorf("got %v, want the note's SHA-256 and not its text", data)
		}
	})
	t.Run("OKExcludeThenInclude", func(t *testing.T) {
		r := do(store.ReviewExclude, "answered in another language throughout")
		if !r.Excluded || r.Reason != "answered in another language throughout" {
			t.Errorf("got %+v, want excluded with the reason", r)
		}
		if _, err := st.SessionByRID(ctx, def.ID, "rev-1"); err != nil {
			t.Errorf("the excluded session is gone: %v", err)
		}
		r = do(store.ReviewInclude, "the language was allowed by the protocol")
		if r.Excluded || r.Reason != "the language was allowed by the protocol" || r.Note != "The model kept to its side." {
			t.Errorf("got %+v, want included with the new reason and the note kept", r)
		}
	})
	refused := []struct {
		name   string
		a      store.ReviewAction
		study  string
		target error
		msg    string
	}{
		{"ErrExcludeWithoutReason", store.ReviewAction{Session: sess.ID, Action: store.ReviewExclude, Text: "  "}, def.ID, nil, "give a reason"},
		{"ErrIncludeNotExcluded", store.ReviewAction{Session: sess.ID, Action: store.ReviewInclude, Text: "why not"}, def.ID, nil, "is not excluded"},
		{"ErrUnknownAction", store.ReviewAction{Session: sess.ID, Action: "delete"}, def.ID, nil, "unknown review decision"},
		{"ErrTooLong", store.ReviewAction{Session: sess.ID, Action: store.ReviewNote, Text: strings.Repeat("é", store.MaxReviewText+1)}, def.ID, nil, "at most 4000"},
		{"ErrOtherStudy", store.ReviewAction{Session: sess.ID, Action: store.ReviewMark}, "another-study", store.ErrNotFound, ""},
		{"ErrUnknownSession", store.ReviewAction{Session: 9999, Action: store.ReviewMark}, def.ID, store.ErrNotFound, ""},
	}
	for _, c := range refused {
		t.Run(c.name, func(t *testing.T) {
			before := chainLen(t, st, def.ID)
			old, err := st.ReviewOf(ctx, sess.ID)
			if err != nil {
				t.Fatal(err)
			}
			c.a.By = by
			_, err = st.Review(ctx, c.study, c.a)
			var ie *store.InvalidError
			switch {
			case c.target != nil && !errors.Is(err, c.target):
				t.Fatalf("got %v, want %v", err, c.target)
			case c.target == nil && (!errors.As(err, &ie) || !strings.Contains(ie.Msg, c.msg)):
				t.Fatalf("got %v, want an InvalidError containing %q", err, c.msg)
			}
			now, err := st.ReviewOf(ctx, sess.ID)
			if err != nil {
				t.Fatal(err)
			}
			if now != old || chainLen(t, st, def.ID) != before {
				t.Errorf("a refused decision changed the review (%+v to %+v) or the chain", old, now)
			}
		})
	}
	t.Run("OKChainVerifies", func(t *testing.T) {
		if r := check(t, st, def.ID); !r.OK() {
			t.Errorf("chain: %v %v", r.Chain, r.Mismatch)
		}
	})
}

// TestListSessions: the transcript list's filters and search.
func TestListSessions(t *testing.T) {
	ctx := context.Background()
	st, def, sv, as := mustDemo(t)
	allow := func([]store.Turn, bool) error { return nil }
	ids := map[string]int64{}
	for i, rid := range []string{"L-1", "L-2", "L-3", "L-4"} {
		lean := []string{"left", "right"}[i%2]
		sess, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(rid, lean), as)
		if err != nil {
			t.Fatal(err)
		}
		ids[rid] = sess.ID
		text := "I walk to the mill quarter most days."
		if rid == "L-3" {
			text = "My 100% honest view: the GORGE_line is fine."
		}
		if _, err := st.AddReply(ctx, sess, text, "c1", allow); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := st.Finish(ctx, ids["L-2"]); err != nil {
		t.Fatal(err)
	}
	if _, err := st.Review(ctx, def.ID, store.ReviewAction{Session: ids["L-4"], Action: store.ReviewExclude, Text: "test entry"}); err != nil {
		t.Fatal(err)
	}
	if err := st.MarkSynthetic(ctx, ids["L-1"]); err != nil {
		t.Fatal(err)
	}
	for _, c := range []struct {
		name string
		f    store.SessionFilter
		want []string
	}{
		{"OKPilotLeavesOutSynthetic", store.SessionFilter{Cohort: store.CohortPilot}, []string{"L-2", "L-3", "L-4"}},
		{"OKSynthetic", store.SessionFilter{Cohort: store.CohortSynthetic}, []string{"L-1"}},
		{"OKMainIsEmptyBeforeLive", store.SessionFilter{Cohort: store.CohortMain}, nil},
		{"OKCompleted", store.SessionFilter{Cohort: store.CohortAll, Completed: "yes"}, []string{"L-2"}},
		{"OKNotExcluded", store.SessionFilter{Cohort: store.CohortAll, Excluded: "no"}, []string{"L-1", "L-2", "L-3"}},
		{"OKSearchCaseInsensitive", store.SessionFilter{Cohort: store.CohortAll, Search: "MILL quarter"}, []string{"L-1", "L-2", "L-4"}},
		{"OKSearchPercentAndUnderscoreAreLiteral", store.SessionFilter{Cohort: store.CohortAll, Search: "100% honest"}, []string{"L-3"}},
		{"OKSearchUnderscore", store.SessionFilter{Cohort: store.CohortAll, Search: "gorge_"}, []string{"L-3"}},
		{"OKSearchRID", store.SessionFilter{Cohort: store.CohortAll, Search: "l-4"}, []string{"L-4"}},
		{"OKIDs", store.SessionFilter{Cohort: store.CohortAll, IDs: []int64{ids["L-1"], ids["L-3"]}}, []string{"L-1", "L-3"}},
		{"OKNoIDs", store.SessionFilter{Cohort: store.CohortAll, IDs: []int64{}}, nil},
	} {
		t.Run(c.name, func(t *testing.T) {
			rows, total, err := st.ListSessions(ctx, def.ID, c.f)
			if err != nil {
				t.Fatal(err)
			}
			var got []string
			for _, r := range rows {
				got = append(got, r.RID)
			}
			slices.Sort(got)
			if !slices.Equal(got, c.want) || total != len(c.want) {
				t.Errorf("got %v (total %d), want %v", got, total, c.want)
			}
		})
	}
	t.Run("OKRowFields", func(t *testing.T) {
		row, err := st.SessionInStudy(ctx, def.ID, ids["L-4"])
		if err != nil {
			t.Fatal(err)
		}
		if row.Replies != 1 || row.Turns != 1 || !row.Pilot || row.Synthetic || !row.Review.Excluded || row.Review.Reason != "test entry" || row.LastActivity.Before(row.CreatedAt) {
			t.Errorf("got %+v, want 1 reply, pilot, excluded for a test entry", row)
		}
	})
	t.Run("OKPaging", func(t *testing.T) {
		rows, total, err := st.ListSessions(ctx, def.ID, store.SessionFilter{Cohort: store.CohortAll, Limit: 3, Offset: 3})
		if err != nil || total != 4 || len(rows) != 1 || rows[0].RID != "L-1" {
			t.Errorf("got %d rows of %d, %v; want the oldest, L-1, on the second page of 3", len(rows), total, err)
		}
	})
	for _, c := range []struct {
		name string
		f    store.SessionFilter
	}{
		{"ErrCohort", store.SessionFilter{Cohort: "everyone"}},
		{"ErrYesNo", store.SessionFilter{Cohort: store.CohortAll, Reviewed: "maybe"}},
	} {
		t.Run(c.name, func(t *testing.T) {
			var ie *store.InvalidError
			if _, _, err := st.ListSessions(ctx, def.ID, c.f); !errors.As(err, &ie) {
				t.Errorf("got %v, want an InvalidError", err)
			}
		})
	}
	t.Run("ErrSessionOfOtherStudy", func(t *testing.T) {
		if _, err := st.SessionInStudy(ctx, "another-study", ids["L-1"]); !errors.Is(err, store.ErrNotFound) {
			t.Errorf("got %v, want ErrNotFound", err)
		}
	})
}
