package store_test

import (
	"context"
	"database/sql"
	"fmt"
	"os"
	"path/filepath"
	"runtime"
	"strings"
	"sync"
	"sync/atomic"
	"testing"

	"trialogue/store"
)

// dumpTables reads every row of every table of a database file, as text
// keyed by table.
func dumpTables(tb testing.TB, path string) map[string][]string {
	tb.Helper()
	db, err := sql.Open("sqlite", "file:"+path+"?_pragma=query_only(1)&_pragma=busy_timeout(10000)")
	if err != nil {
		tb.Fatal(err)
	}
	defer db.Close()
	names, err := db.Query(`SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%' ORDER BY name`)
	if err != nil {
		tb.Fatal(err)
	}
	var tables []string
	for names.Next() {
		var n string
		names.Scan(&n)
		tables = append(tables, n)
	}
	names.Close()
	out := map[string][]string{}
	for _, tname := range tables {
		rows, err := db.Query(`SELECT * FROM "` + tname + `" ORDER BY 1, 2`)
		if err != nil {
			tb.Fatal(err)
		}
		cols, _ := rows.Columns()
		for rows.Next() {
			vals := make([]any, len(cols))
			ptrs := make([]any, len(cols))
			for i := range vals {
				ptrs[i] = &vals[i]
			}
			if err := rows.Scan(ptrs...); err != nil {
				tb.Fatal(err)
			}
			out[tname] = append(out[tname], fmt.Sprintf("%q", vals))
		}
		if err := rows.Err(); err != nil {
			tb.Fatal(err)
		}
		rows.Close()
		if out[tname] == nil {
			out[tname] = []string{}
		}
	}
	return out
}

// TestBackup copies a database while respondents enter and reply, restores
// the copy and checks it row by row against the original.
func TestBackup(t *testing.T) {
	sqliteOnly(t)
	ctx := context.Background()
	dir := t.TempDir()
	path := filepath.Join(dir, "live.db")
	st := mustOpen(t, path)
	def, src := mustStudy(t)
	sv, err := st.RegisterStudy(ctx, def, src)
	if err != nil {
		t.Fatal(err)
	}
	as := assigner(t, def, sv)

	// writers keep entering and replying while the first copy is taken
	var stop atomic.Bool
	var wg sync.WaitGroup
	var entered atomic.Int64
	for w := range 4 {
		wg.Go(func() {
			for i := 0; !stop.Load() || i < 10; i++ {
				lean := []string{"left", "centre", "right"}[i%3]
				sess, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("B-%d-%d", w, i), lean), as)
				if err != nil {
					t.Error(err)
					return
				}
				entered.Add(1)
				st.AddReply(ctx, sess, "A reply about the cable car", "c1", func([]store.Turn, bool) error { return nil })
			}
		})
	}
	for entered.Load() < 40 {
		runtime.Gosched()
	}
	during := filepath.Join(dir, "during.db")
	if _, err := store.Backup(ctx, path, during); err != nil {
		stop.Store(true)
		wg.Wait()
		t.Fatal(err)
	}
	stop.Store(true)
	wg.Wait()

	t.Run("OKSnapshotConsistent", func(t *testing.T) {
		got := dumpTables(t, during)
		live := dumpTables(t, path)
		for table, rows := range got {
			if table == "strata" {
				continue // next_slot moves on; checked below
			}
			have := map[string]bool{}
			for _, r := range live[table] {
				have[r] = true
			}
			for _, r := range rows {
				if !have[r] {
					t.Fatalf("table %s: the copy has a row the original lacks: %s", table, r)
				}
			}
		}
		restored := mustOpen(t, during)
		sessions, err := restored.SessionsOf(ctx, def.ID, store.WithSynthetic)
		if err != nil {
			t.Fatal(err)
		}
		perStratum := map[string]int{}
		for _, s := range sessions {
			perStratum[s.Stratum]++
		}
		db, _ := sql.Open("sqlite", "file:"+during+"?_pragma=query_only(1)")
		defer db.Close()
		for stratum, n := range perStratum {
			var next int
			if err := db.QueryRow(`SELECT next_slot FROM strata WHERE study_id = ? AND stratum = ?`, def.ID, stratum).Scan(&next); err != nil {
				t.Fatal(err)
			}
			if next != n {
				t.Fatalf("stratum %s in the copy: next slot %d, want %d (its sessions): not one snapshot", stratum, next, n)
			}
		}
	})

	after := filepath.Join(dir, "after.db")
	size, err := store.Backup(ctx, path, after)
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OKEveryRow", func(t *testing.T) {
		if info, err := os.Stat(after); err != nil || info.Size() != size {
			t.Fatalf("copy size: got %v %v, want %d", info, err, size)
		}
		want := dumpTables(t, path)
		got := dumpTables(t, after)
		if len(got) != len(want) {
			t.Fatalf("tables: got %d, want %d", len(got), len(want))
		}
		for table, rows := range want {
			if strings.Join(got[table], "\n") != strings.Join(rows, "\n") {
				t.Fatalf("table %s: got %d rows, want %d, or they differ", table, len(got[table]), len(rows))
			}
		}
		if len(want["turns"]) == 0 || len(want["sessions"]) < 40 {
			t.Fatalf("the original holds %d sessions and %d turns; the test wrote too little", len(want["sessions"]), len(want["turns"]))
		}
		// restored: a store opens on the copy and finds the same sessions
		restored := mustOpen(t, after)
		a, _ := st.SessionsOf(ctx, def.ID, store.WithSynthetic)
		b, err := restored.SessionsOf(ctx, def.ID, store.WithSynthetic)
		if err != nil || len(a) != len(b) {
			t.Fatalf("restored sessions: got %d (%v), want %d", len(b), err, len(a))
		}
	})
	t.Run("ErrOutputExists", func(t *testing.T) {
		before, _ := os.ReadFile(after)
		if _, err := store.Backup(ctx, path, after); err == nil || !strings.Contains(err.Error(), "already exists") {
			t.Fatalf("got %v, want an error saying the file exists", err)
		}
		if now, _ := os.ReadFile(after); string(now) != string(before) {
			t.Fatalf("the existing file was changed")
		}
	})
	t.Run("ErrMissingDatabase", func(t *testing.T) {
		out := filepath.Join(dir, "none.db")
		if _, err := store.Backup(ctx, filepath.Join(dir, "no-such.db"), out); err == nil || !strings.Contains(err.Error(), "no-such.db") {
			t.Fatalf("got %v, want an error naming the missing database", err)
		}
		if _, err := os.Stat(out); err == nil {
			t.Fatalf("a failed backup left a file")
		}
	})
	t.Run("ErrNotTrialogue", func(t *testing.T) {
		other := filepath.Join(dir, "other.txt")
		os.WriteFile(other, []byte("not a database"), 0o600)
		out := filepath.Join(dir, "other-copy.db")
		if _, err := store.Backup(ctx, other, out); err == nil {
			t.Fatalf("got no error, want one for a file that is not a database")
		}
		if _, err := os.Stat(out); err == nil {
			t.Fatalf("a failed backup left a file")
		}
	})
	if leftovers, _ := filepath.Glob(filepath.Join(dir, ".*partial*")); len(leftovers) > 0 {
		t.Fatalf("temporary files left: %v", leftovers)
	}
}

// TestSynthetic: marked sessions are left out of listings and counts unless
// asked for.
func TestSynthetic(t *testing.T) {
	ctx := context.Background()
	st, def, sv, as := mustDemo(t)
	var ids []int64
	for i := range 6 {
		enter := st.Enter
		if i < 2 {
			enter = st.EnterSynthetic // marked as it is created
		}
		sess, _, err := enter(ctx, sv, "lean=left", respondent(fmt.Sprintf("S-%d", i), "left"), as)
		if err != nil {
			t.Fatal(err)
		}
		ids = append(ids, sess.ID)
	}
	// Entering again changes no mark: a synthetic key on a real
	// respondent's second entry does not make it synthetic, nor the reverse.
	if again, created, err := st.EnterSynthetic(ctx, sv, "lean=left", respondent("S-5", "left"), as); err != nil || created || again.ID != ids[5] {
		t.Fatalf("re-entry: got %d created %v (%v), want session %d again", again.ID, created, err, ids[5])
	}
	if again, created, err := st.Enter(ctx, sv, "lean=left", respondent("S-0", "left"), as); err != nil || created || again.ID != ids[0] {
		t.Fatalf("re-entry: got %d created %v (%v), want session %d again", again.ID, created, err, ids[0])
	}
	for _, tc := range []struct {
		name string
		f    store.Synthetic
		want int
	}{{"OKRealOnlyByDefault", 0, 4}, {"OKWithSynthetic", store.WithSynthetic, 6}, {"OKSyntheticOnly", store.SyntheticOnly, 2}} {
		t.Run(tc.name, func(t *testing.T) {
			got, err := st.SessionsOf(ctx, def.ID, tc.f)
			if err != nil || len(got) != tc.want {
				t.Fatalf("sessions: got %d (%v), want %d", len(got), err, tc.want)
			}
			counts, err := st.ArmCounts(ctx, def.ID, tc.f)
			sum := 0
			for _, n := range counts {
				sum += n
			}
			if err != nil || sum != tc.want {
				t.Fatalf("arm counts: got %v (%v), want a total of %d", counts, err, tc.want)
			}
		})
	}
	t.Run("OKIsSynthetic", func(t *testing.T) {
		if yes, err := st.IsSynthetic(ctx, ids[0]); err != nil || !yes {
			t.Fatalf("got %v %v, want true", yes, err)
		}
		if yes, err := st.IsSynthetic(ctx, ids[5]); err != nil || yes {
			t.Fatalf("got %v %v, want false", yes, err)
		}
	})
	t.Run("ErrUnknownSession", func(t *testing.T) {
		if err := st.MarkSynthetic(ctx, 999999); err == nil || !strings.Contains(err.Error(), "not found") {
			t.Fatalf("got %v, want not found", err)
		}
	})
	t.Run("ErrBadFilter", func(t *testing.T) {
		if _, err := st.SessionsOf(ctx, def.ID, store.Synthetic(7)); err == nil {
			t.Fatalf("got no error for an unknown filter")
		}
	})
}
