package store_test

import (
	"archive/tar"
	"bytes"
	"compress/gzip"
	"context"
	"database/sql"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"

	"trialogue/store"
)

// populate enters respondents into the demo study, has some of them reply
// and be answered, and finishes a few: every kind of chain record.
func populate(t *testing.T) (*store.Store, string) {
	t.Helper()
	ctx := context.Background()
	st, _, sv, as := mustDemo(t)
	allow := func([]store.Turn, bool) error { return nil }
	for i := range 9 {
		lean := []string{"left", "centre", "right"}[i%3]
		sess, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("chain-%d", i), lean), as)
		if err != nil {
			t.Fatal(err)
		}
		for j := range 2 {
			a, err := st.AddReply(ctx, sess, fmt.Sprintf("reply %d of respondent %d", j, i), fmt.Sprintf("c%d", j), allow)
			if err != nil {
				t.Fatal(err)
			}
			if _, err := st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: a.Turn.Index + 1, Text: "answer " + fmt.Sprint(j),
				StartedAt: time.Now(), ModelRequested: "scripted", ModelReported: "scripted", SystemSHA256: "s", RequestSHA256: "r", StudyHash: sess.StudyHash}); err != nil {
				t.Fatal(err)
			}
		}
		if i%2 == 0 {
			if _, err := st.Finish(ctx, sess.ID); err != nil {
				t.Fatal(err)
			}
		}
	}
	return st, "quillhaven-cable-car"
}

func check(t *testing.T, st *store.Store, study string) store.Report {
	t.Helper()
	d, err := st.LoadDataset(context.Background(), study)
	if err != nil {
		t.Fatal(err)
	}
	return d.Check()
}

// tamper changes the database file directly, as someone with the file could.
func tamper(t *testing.T, st *store.Store, stmts ...string) {
	t.Helper()
	sqliteOnly(t)
	db, err := sql.Open("sqlite", "file:"+st.Path()+"?_pragma=busy_timeout(5000)")
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	for _, q := range stmts {
		if _, err := db.Exec(q); err != nil {
			t.Fatalf("tamper %q: %v", q, err)
		}
	}
}

func TestChainHolds(t *testing.T) {
	st, study := populate(t)
	r := check(t, st, study)
	if !r.OK() {
		t.Fatalf("untouched study: chain %v, mismatches %v, allocation %v", r.Chain, r.Mismatch, r.Allocated)
	}
	// 1 version + 9 assignments + 36 turns + 5 finishes
	if r.Records != 51 || r.Sessions != 9 || r.Turns != 36 {
		t.Fatalf("got %d records, %d sessions, %d turns; want 51, 9, 36", r.Records, r.Sessions, r.Turns)
	}
	head, err := st.ChainHead(context.Background(), study)
	if err != nil || head.Hash != r.Head.Hash || head.Seq != 51 {
		t.Fatalf("head: got %+v (%v), want record 51 %s", head, err, r.Head.Hash)
	}
}

// TestTamperDatabase makes each kind of tampering directly in the SQLite
// file and checks that the audit names it.
func TestTamperDatabase(t *testing.T) {
	for _, tc := range []struct {
		name   string
		stmts  []string
		how    string // the chain break, if one
		seq    int64
		record string // a record mismatch, if one
	}{
		{name: "ErrTurnTextEdited", stmts: []string{`UPDATE turns SET text = 'reply 0 of respondent 4!' WHERE text = 'reply 0 of respondent 4'`},
			record: "its text was changed after it was logged"},
		{name: "ErrChainContentEdited", stmts: []string{`UPDATE chain SET content = replace(content, '"slot":0', '"slot":7') WHERE seq = 2`},
			how: store.BreakEdited, seq: 2},
		{name: "ErrChainRecordMissing", stmts: []string{`DELETE FROM chain WHERE seq = 10`},
			how: store.BreakMissing, seq: 11},
		{name: "ErrChainReordered", stmts: []string{`UPDATE chain SET seq = -1 WHERE seq = 20`, `UPDATE chain SET seq = 20 WHERE seq = 21`, `UPDATE chain SET seq = 21 WHERE seq = -1`},
			how: store.BreakReordered, seq: 20},
		{name: "ErrChainInserted", stmts: []string{
			`UPDATE chain SET seq = seq + 1000 WHERE seq >= 30`,
			`UPDATE chain SET seq = seq - 999 WHERE seq >= 1030`,
			// a forged record at 30 that links correctly to 29 and hashes correctly
			`INSERT INTO chain (study_id, seq, kind, at, content, prev, hash) SELECT study_id, 30, kind, at, replace(content, '"seq":29', '"seq":30'), hash, 'FORGED' FROM chain WHERE seq = 29`},
			how: store.BreakInserted, seq: 30},
		{name: "ErrAssignmentAltered", stmts: []string{`UPDATE sessions SET arm = CASE arm WHEN 'letter' THEN 'notice' ELSE 'letter' END WHERE id = 3`},
			record: "session 3: arm"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			st, study := populate(t)
			tamper(t, st, tc.stmts...)
			if tc.how == store.BreakInserted {
				// the forged record hashes correctly and links to its predecessor:
				// only the next record's link gives it away
				fixForgedHash(t, st)
			}
			r := check(t, st, study)
			if tc.how != "" {
				if r.Chain == nil || r.Chain.How != tc.how || r.Chain.Seq != tc.seq {
					t.Fatalf("got break %v, want %s at record %d", r.Chain, tc.how, tc.seq)
				}
			}
			if tc.record != "" && !strings.Contains(strings.Join(r.Mismatch, "\n"), tc.record) {
				t.Fatalf("got mismatches %q, want one containing %q", r.Mismatch, tc.record)
			}
			if r.OK() {
				t.Fatal("tampered study passed the audit")
			}
		})
	}
}

// fixForgedHash gives a forged chain row a hash that matches its content.
func fixForgedHash(t *testing.T, st *store.Store) {
	t.Helper()
	sqliteOnly(t)
	db, err := sql.Open("sqlite", "file:"+st.Path())
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	var prev, content string
	err = db.QueryRow(`SELECT prev, content FROM chain WHERE hash = 'FORGED'`).Scan(&prev, &content)
	if errors.Is(err, sql.ErrNoRows) {
		return
	}
	if err != nil {
		t.Fatal(err)
	}
	if _, err := db.Exec(`UPDATE chain SET hash = ? WHERE hash = 'FORGED'`, store.ChainHash(prev, []byte(content))); err != nil {
		t.Fatal(err)
	}
}

// TestAllocationAudit: the audit passes on the recorded assignments and
// fails when one assignment or the seed is altered.
func TestAllocationAudit(t *testing.T) {
	st, study := populate(t)
	d, err := st.LoadDataset(context.Background(), study)
	if err != nil {
		t.Fatal(err)
	}
	if r := d.Check(); len(r.Allocated) != 0 || r.Sealed {
		t.Fatalf("untouched: got %v (sealed %v)", r.Allocated, r.Sealed)
	}
	t.Run("ErrAssignmentAltered", func(t *testing.T) {
		d2 := *d
		d2.Sessions = append([]store.Session(nil), d.Sessions...)
		other := "notice"
		if d2.Sessions[4].Arm == other {
			other = "letter"
		}
		d2.Sessions[4].Arm = other
		r := d2.Check()
		if len(r.Allocated) == 0 || !strings.Contains(r.Allocated[0], fmt.Sprintf("session %d", d2.Sessions[4].ID)) {
			t.Fatalf("got %v, want the altered session named", r.Allocated)
		}
	})
	t.Run("ErrSeedDoesNotReproduce", func(t *testing.T) {
		d2 := *d
		d2.Seed = append([]byte(nil), d.Seed...)
		d2.Seed[0] ^= 1
		if r := d2.Check(); len(r.Allocated) == 0 {
			t.Fatal("a different seed reproduced every assignment")
		}
	})
	t.Run("ErrSlotSkipped", func(t *testing.T) {
		d2 := *d
		d2.Sessions = append([]store.Session(nil), d.Sessions...)
		d2.Sessions[0].Slot += 100
		if r := d2.Check(); !strings.Contains(strings.Join(r.Allocated, "\n"), "skipped") {
			t.Fatalf("got %v, want a skipped slot", r.Allocated)
		}
	})
}

func writeBundle(t *testing.T, st *store.Store, study string, release bool) string {
	t.Helper()
	path := filepath.Join(t.TempDir(), "b.tar.gz")
	f, err := os.Create(path)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := st.WriteBundle(context.Background(), study, f, release); err != nil {
		t.Fatal(err)
	}
	if err := f.Close(); err != nil {
		t.Fatal(err)
	}
	return path
}

// rewriteBundle applies edit to the files of a bundle and writes it anew.
func rewriteBundle(t *testing.T, path string, edit func(files map[string][]byte)) string {
	t.Helper()
	raw, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	gz, err := gzip.NewReader(bytes.NewReader(raw))
	if err != nil {
		t.Fatal(err)
	}
	tr := tar.NewReader(gz)
	files := map[string][]byte{}
	var order []string
	for {
		h, err := tr.Next()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
		b, _ := io.ReadAll(tr)
		files[h.Name] = b
		order = append(order, h.Name)
	}
	edit(files)
	var out bytes.Buffer
	gw := gzip.NewWriter(&out)
	tw := tar.NewWriter(gw)
	for _, n := range order {
		b, ok := files[n]
		if !ok {
			continue
		}
		tw.WriteHeader(&tar.Header{Name: n, Mode: 0o644, Size: int64(len(b))})
		tw.Write(b)
	}
	tw.Close()
	gw.Close()
	p := filepath.Join(t.TempDir(), "edited.tar.gz")
	if err := os.WriteFile(p, out.Bytes(), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

func TestBundle(t *testing.T) {
	ctx := context.Background()
	st, study := populate(t)
	t.Run("OKSealed", func(t *testing.T) {
		b, err := store.ReadBundle(writeBundle(t, st, study, false))
		if err != nil {
			t.Fatal(err)
		}
		r := b.Dataset.Check()
		if !r.OK() || !r.Sealed || !b.Manifest.Sealed || b.Dataset.Seed != nil {
			t.Fatalf("sealed bundle: ok %v sealed %v seed %v; %v %v", r.OK(), r.Sealed, b.Dataset.Seed, r.Chain, r.Mismatch)
		}
	})
	if err := st.CloseStudy(ctx, study); err != nil {
		t.Fatal(err)
	}
	path := writeBundle(t, st, study, false)
	t.Run("OKClosedWithAllocationAudit", func(t *testing.T) {
		b, err := store.ReadBundle(path)
		if err != nil {
			t.Fatal(err)
		}
		r := b.Dataset.Check()
		if !r.OK() || r.Sealed || r.Records != 52 {
			t.Fatalf("closed bundle: ok %v sealed %v records %d; %v %v %v", r.OK(), r.Sealed, r.Records, r.Chain, r.Mismatch, r.Allocated)
		}
	})
	t.Run("OKRelease", func(t *testing.T) {
		tamper(t, st, `UPDATE turns SET text = 'write to me at ada@example.org' WHERE text = 'reply 1 of respondent 2'`)
		defer tamper(t, st, `UPDATE turns SET text = 'reply 1 of respondent 2' WHERE text = 'write to me at ada@example.org'`)
		// the edit is itself tampering; the release copy must still show the masked text and not the rid
		rel := writeBundle(t, st, study, true)
		b, err := store.ReadBundle(rel)
		if err != nil {
			t.Fatal(err)
		}
		for _, s := range b.Dataset.Sessions {
			if s.RID != "" {
				t.Fatalf("release copy holds rid %q", s.RID)
			}
		}
		found := false
		for _, tn := range b.Dataset.Turns {
			if strings.Contains(tn.Text, "ada@example.org") {
				t.Fatal("release copy holds an e-mail address")
			}
			found = found || strings.Contains(tn.Text, "[email]")
		}
		if !found {
			t.Fatal("no masked text in the release copy")
		}
	})
	t.Run("ErrTruncated", func(t *testing.T) {
		raw, _ := os.ReadFile(path)
		p := filepath.Join(t.TempDir(), "cut.tar.gz")
		os.WriteFile(p, raw[:len(raw)/2], 0o600)
		if _, err := store.ReadBundle(p); !errors.Is(err, store.ErrBundleArchive) {
			t.Fatalf("got %v, want ErrBundleArchive", err)
		}
	})
	t.Run("ErrNotAnArchive", func(t *testing.T) {
		p := filepath.Join(t.TempDir(), "x.tar.gz")
		os.WriteFile(p, []byte("this is not an archive"), 0o600)
		if _, err := store.ReadBundle(p); !errors.Is(err, store.ErrBundleArchive) {
			t.Fatalf("got %v, want ErrBundleArchive", err)
		}
	})
	t.Run("ErrNewerFormat", func(t *testing.T) {
		p := rewriteBundle(t, path, func(f map[string][]byte) {
			k := study + "/manifest.json"
			f[k] = bytes.Replace(f[k], []byte(`"format": 1`), []byte(`"format": 2`), 1)
		})
		if _, err := store.ReadBundle(p); !errors.Is(err, store.ErrBundleFormat) {
			t.Fatalf("got %v, want ErrBundleFormat", err)
		}
	})
	t.Run("ErrMissingFile", func(t *testing.T) {
		p := rewriteBundle(t, path, func(f map[string][]byte) { delete(f, study+"/turns.jsonl") })
		_, err := store.ReadBundle(p)
		if !errors.Is(err, store.ErrBundleMissing) || !strings.Contains(err.Error(), "turns.jsonl") {
			t.Fatalf("got %v, want ErrBundleMissing naming turns.jsonl", err)
		}
	})
	t.Run("ErrTurnEditedInBundle", func(t *testing.T) {
		p := rewriteBundle(t, path, func(f map[string][]byte) {
			k := study + "/turns.jsonl"
			f[k] = bytes.Replace(f[k], []byte("reply 0 of respondent 7"), []byte("reply 0 of respondent 8"), 1)
		})
		b, err := store.ReadBundle(p)
		if err != nil {
			t.Fatal(err)
		}
		r := b.Dataset.Check()
		if !strings.Contains(strings.Join(r.Mismatch, "\n"), "its text was changed") {
			t.Fatalf("got %v, want the edited turn named", r.Mismatch)
		}
	})
	t.Run("ErrChainReorderedInBundle", func(t *testing.T) {
		p := rewriteBundle(t, path, func(f map[string][]byte) {
			k := study + "/chain.jsonl"
			lines := strings.Split(strings.TrimSuffix(string(f[k]), "\n"), "\n")
			lines[5], lines[6] = lines[6], lines[5]
			f[k] = []byte(strings.Join(lines, "\n") + "\n")
		})
		b, err := store.ReadBundle(p)
		if err != nil {
			t.Fatal(err)
		}
		if r := b.Dataset.Check(); r.Chain == nil || r.Chain.How != store.BreakReordered || r.Chain.Seq != 7 {
			t.Fatalf("got %v, want reordered at record 7", r.Chain)
		}
	})
	t.Run("ErrChainRecordDroppedInBundle", func(t *testing.T) {
		p := rewriteBundle(t, path, func(f map[string][]byte) {
			k := study + "/chain.jsonl"
			lines := strings.Split(strings.TrimSuffix(string(f[k]), "\n"), "\n")
			lines = append(lines[:12], lines[13:]...)
			f[k] = []byte(strings.Join(lines, "\n") + "\n")
		})
		b, err := store.ReadBundle(p)
		if err != nil {
			t.Fatal(err)
		}
		if r := b.Dataset.Check(); r.Chain == nil || r.Chain.How != store.BreakMissing || r.Chain.Seq != 14 {
			t.Fatalf("got %v, want missing before record 14", r.Chain)
		}
	})
	t.Run("OKManifestRecordsFiles", func(t *testing.T) {
		b, err := store.ReadBundle(path)
		if err != nil {
			t.Fatal(err)
		}
		var names []string
		for n := range b.Manifest.Files {
			names = append(names, n)
		}
		for _, want := range []string{"allocation/seed.txt", "allocation/sequence.csv", "study/v1/study.yaml", "study/v1/canonical.json", "README.md"} {
			if _, ok := b.Manifest.Files[want]; !ok {
				t.Fatalf("bundle lacks %s (has %v)", want, names)
			}
		}
		j, _ := json.Marshal(b.Manifest.Head)
		if b.Manifest.Head.Seq != 52 {
			t.Fatalf("manifest head %s, want record 52", j)
		}
	})
}

func TestClosedStudyRefusesNewRespondents(t *testing.T) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(t)
	old, _, err := st.Enter(ctx, sv, "lean=left", respondent("before", "left"), as)
	if err != nil {
		t.Fatal(err)
	}
	if err := st.CloseStudy(ctx, sv.ID); err != nil {
		t.Fatal(err)
	}
	if _, _, err := st.Enter(ctx, sv, "lean=left", respondent("after", "left"), as); !errors.Is(err, store.ErrStudyClosed) {
		t.Fatalf("new respondent: got %v, want ErrStudyClosed", err)
	}
	again, created, err := st.Enter(ctx, sv, "lean=left", respondent("before", "left"), as)
	if err != nil || created || again.ID != old.ID {
		t.Fatalf("returning respondent: got %+v %v %v, want the old session", again, created, err)
	}
	if err := st.CloseStudy(ctx, "no-such-study"); !errors.Is(err, store.ErrNotFound) {
		t.Fatalf("close unknown: got %v, want ErrNotFound", err)
	}
}

// BenchmarkVerify measures loading and checking a study of 5,000 sessions
// and 60,000 turns (12 per session), with its chain and allocation audit.
// Building the study takes a while and is not timed.
func BenchmarkVerify(b *testing.B) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(b)
	allow := func([]store.Turn, bool) error { return nil }
	const sessions, perSession = 5000, 6
	work := make(chan int)
	errs := make(chan error, 64)
	for range 64 {
		go func() {
			for i := range work {
				lean := []string{"left", "centre", "right"}[i%3]
				sess, _, err := st.Enter(ctx, sv, "lean="+lean, respondent(fmt.Sprintf("bench-%d", i), lean), as)
				if err != nil {
					errs <- err
					return
				}
				for j := range perSession {
					a, err := st.AddReply(ctx, sess, fmt.Sprintf("reply %d of respondent %d about the gorge", j, i), fmt.Sprint(j), allow)
					if err == nil {
						_, err = st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: a.Turn.Index + 1, Text: "an answer about the cable car " + fmt.Sprint(j),
							StartedAt: time.Now(), ModelRequested: "scripted", ModelReported: "scripted", SystemSHA256: "s", RequestSHA256: "r", StudyHash: sess.StudyHash})
					}
					if err != nil {
						errs <- err
						return
					}
				}
			}
			errs <- nil
		}()
	}
	for i := range sessions {
		work <- i
	}
	close(work)
	for range 64 {
		if err := <-errs; err != nil {
			b.Fatal(err)
		}
	}
	b.ResetTimer()
	for b.Loop() {
		d, err := st.LoadDataset(ctx, sv.ID)
		if err != nil {
			b.Fatal(err)
		}
		if r := d.Check(); !r.OK() || r.Turns != sessions*perSession*2 {
			b.Fatalf("got ok %v with %d turns", r.OK(), r.Turns)
		}
	}
}
