package store_test

import (
	"context"
	"database/sql"
	"errors"
	"slices"
	"strconv"
	"strings"
	"testing"
	"time"

	"trialogue/arms"
	"trialogue/arms/codes"
	"trialogue/arms/flags"
	"trialogue/store"
)

// fieldClock is the store's clock in these tests: fixed, moved by hand.
type fieldClock struct{ t time.Time }

func (c *fieldClock) now() time.Time { return c.t }

// fieldStart is when the scenario's first respondent enters.
var fieldStart = time.Date(2027, 5, 3, 8, 0, 0, 0, time.UTC)

// scenario is a small fielding of the demo study, written through the
// store's own methods: what flags and exports read.
type scenario struct {
	st   *store.Store
	def  *arms.Study
	sv   store.StudyVersion
	sess map[string]store.Session // by rid
	// texts are the stored texts of every turn, by rid, in order.
	texts map[string][]string
}

// The scenario's respondents.
const (
	ridAlder   = "R-ALDER"   // debate: concedes, a pasted reply, a retried model call; finished
	ridBirch   = "R-BIRCH"   // notice: no turns; reviewed and excluded; finished
	ridCedar   = "R-CEDAR"   // reflect, pilot; unfinished
	ridDogwood = "R-DOGWOOD" // chit-chat, synthetic
	ridElm     = "R-ELM"     // tailored message: reveals the age; a failed call; past the time limit
)

// pastedReply holds an e-mail address, a phone number and a URL (all
// fictional), the text "NA", a formula-like cell, digits of another script
// and an emoji: what a release copy must mask and what CSV readers trip on.
const pastedReply = "Write to me at resident.one@example.org or call +44 20 7946 0958, see https://example.org/x \u2014 NA =1+1 \u0661\u0662\u0663 \U0001F600"

// typedReply has a comma, double quotes and three kinds of line break.
const typedReply = "I think, honestly, it's \"too\" expensive.\r\nSecond line\rthird line\nfourth"

func newScenario(t *testing.T) *scenario {
	t.Helper()
	ctx := context.Background()
	st, def, sv, _ := mustDemo(t)
	clk := &fieldClock{t: fieldStart}
	st.Now = clk.now
	sc := &scenario{st: st, def: def, sv: sv, sess: map[string]store.Session{}, texts: map[string][]string{}}
	allow := func([]store.Turn, bool) error { return nil }
	enter := func(rid, arm string, covs map[string]string, at time.Duration) store.Session {
		clk.t = fieldStart.Add(at)
		r := arms.Respondent{RID: rid, Covariates: covs}
		sess, created, err := st.Enter(ctx, sv, def.StratumKey(r), r, func(string, int) (string, string) { return arm, def.Arms[arm].Code })
		if err != nil || !created {
			t.Fatalf("enter %s: created %v, err %v", rid, created, err)
		}
		sc.sess[rid] = sess
		return sess
	}
	reply := func(sess store.Session, text string, typing *flags.Typing, at time.Duration) {
		clk.t = fieldStart.Add(at)
		if _, err := st.AddTypedReply(ctx, sess, text, codes.NewToken()[:12], typing, allow); err != nil {
			t.Fatalf("reply of %s: %v", sess.RID, err)
		}
		sc.texts[sess.RID] = append(sc.texts[sess.RID], text)
	}
	model := func(sess store.Session, text string, retries int, at time.Duration) {
		clk.t = fieldStart.Add(at)
		turns, err := st.Turns(ctx, sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		_, err = st.AddModelTurn(ctx, store.Turn{SessionID: sess.ID, Index: len(turns), Text: text, StartedAt: clk.t.Add(-1500 * time.Millisecond),
			LatencyMS: 1500, ModelRequested: "example-chat-2027-01", ModelReported: "example-chat-2027-01-b", Fingerprint: "fp_demo",
			Params: `{"temperature":0.7}`, PromptTokens: 120, CompletionTokens: 40, Retries: retries, FinishReason: "stop",
			SystemSHA256: codes.SHA256Hex([]byte("system")), RequestSHA256: codes.SHA256Hex([]byte(text + "request")), StudyHash: sess.StudyHash})
		if err != nil {
			t.Fatalf("model turn of %s: %v", sess.RID, err)
		}
		sc.texts[sess.RID] = append(sc.texts[sess.RID], text)
	}
	finish := func(sess store.Session, at time.Duration) {
		clk.t = fieldStart.Add(at)
		if _, err := st.Finish(ctx, sess.ID); err != nil {
			t.Fatal(err)
		}
	}

	a := enter(ridAlder, "debate", map[string]string{"age": "47", "lean": "left", "stance": "favour", "district": "Mill Quarter"}, 0)
	model(a, "Hello! What is your first impression of the cable car plan?", 1, 5*time.Second)
	reply(a, typedReply, &flags.Typing{TypingMS: 30000, Keystrokes: 80}, time.Minute)
	model(a, "You're right, the cost is high for a town this size.", 0, 70*time.Second)
	reply(a, pastedReply, &flags.Typing{TypingMS: 2000, Keystrokes: 2, Pastes: 1, HiddenCount: 1}, 2*time.Minute)
	model(a, "Thank you for explaining. Many residents weigh the same trade-offs.", 0, 130*time.Second)
	finish(a, 5*time.Minute)

	b := enter(ridBirch, "notice", map[string]string{"age": "33", "lean": "centre", "stance": "against"}, 10*time.Minute)
	finish(b, 11*time.Minute)

	c := enter(ridCedar, "reflect", map[string]string{"age": "29", "lean": "right", "stance": "unsure"}, 12*time.Minute)
	reply(c, "Pilot reply from the study team, about the gorge.", nil, 13*time.Minute)

	d := enter(ridDogwood, "chit-chat", map[string]string{"age": "52", "lean": "centre", "stance": "favour"}, 14*time.Minute)
	reply(d, "A synthetic respondent talks about herbs on the windowsill.", nil, 15*time.Minute)
	if err := st.MarkSynthetic(ctx, d.ID); err != nil {
		t.Fatal(err)
	}

	e := enter(ridElm, "tailored", map[string]string{"age": "61", "lean": "right", "stance": "unsure", "district": "East Rim, call 0207 946 0000"}, 20*time.Minute)
	clk.t = fieldStart.Add(21 * time.Minute)
	if err := st.RecordFailure(ctx, e.ID, "timeout", 0, 4); err != nil {
		t.Fatal(err)
	}
	model(e, "As a 61-year-old resident, you may find the six-minute trip to the hospital worth the bond.", 0, 60*time.Minute)

	// Pilot marks and reviews are set in the database directly: how they
	// come to be set is the console's business, what matters here is that
	// exports read them.
	db := rawDB(t, st)
	mustExec(t, db, `UPDATE sessions SET pilot = 0`)
	mustExec(t, db, `UPDATE sessions SET pilot = 1 WHERE id = ?`, c.ID)
	mustExec(t, db, `INSERT INTO reviews (session_id, reviewed, note, excluded, reason, at) VALUES (?, 1, 'read twice', 1, ?, ?)`,
		b.ID, "Duplicate of another entry, see the note from desk@example.org", fieldStart.Format(store.TimeFormat))
	return sc
}

// rawDB opens the store's database file beside the store, for what the
// store has no method to write in these tests.
func rawDB(t *testing.T, st *store.Store) *sql.DB {
	t.Helper()
	driver, dsn := "sqlite", "file:"+st.Path()+"?_pragma=busy_timeout(10000)&_pragma=foreign_keys(1)"
	if onPostgres {
		v, _ := pgDSN.Load(st.Path())
		driver, dsn = "pgx", v.(string)
	}
	db, err := sql.Open(driver, dsn)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { db.Close() })
	return db
}

func mustExec(t *testing.T, db *sql.DB, q string, args ...any) {
	t.Helper()
	if onPostgres { // $1, $2, ... for ?: these statements hold no other question mark
		for i := 1; strings.Contains(q, "?"); i++ {
			q = strings.Replace(q, "?", "$"+strconv.Itoa(i), 1)
		}
	}
	if _, err := db.Exec(q, args...); err != nil {
		t.Fatalf("%s: %v", q, err)
	}
}

func codesOf(fs []flags.Flag) []string {
	var out []string
	for _, f := range fs {
		out = append(out, f.Code)
	}
	return out
}

func TestFlags(t *testing.T) {
	ctx := context.Background()
	sc := newScenario(t)
	t.Run("OK", func(t *testing.T) {
		got, err := sc.st.Flags(ctx, sc.def, sc.def.ID)
		if err != nil {
			t.Fatal(err)
		}
		for rid, want := range map[string][]string{
			ridAlder:   {flags.Conceded, flags.Pasted, flags.Errors},
			ridBirch:   nil,
			ridCedar:   nil,
			ridDogwood: nil,
			ridElm:     {flags.Revealed, flags.Errors, flags.Overtime},
		} {
			fs := got[sc.sess[rid].ID]
			if !slices.Equal(codesOf(fs), want) {
				t.Fatalf("%s: got flags %+v, want %v", rid, fs, want)
			}
		}
		if _, ok := got[sc.sess[ridBirch].ID]; ok {
			t.Fatalf("a session without flags is in the map")
		}
		elm := got[sc.sess[ridElm].ID]
		for _, f := range elm {
			if f.Code == flags.Errors && f.Reason != "1 model call failed after every retry" {
				t.Fatalf("got errors reason %q, want the failed call", f.Reason)
			}
		}
	})
	t.Run("ErrUnknownStudy", func(t *testing.T) {
		other := *sc.def
		other.ID = "no-such-study"
		if _, err := sc.st.Flags(ctx, &other, other.ID); !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("got %v, want ErrNotFound", err)
		}
	})
	t.Run("ErrDefinitionOfAnotherStudy", func(t *testing.T) {
		if _, err := sc.st.Flags(ctx, sc.def, "another-study"); err == nil {
			t.Fatal("got no error for a definition of another study")
		}
	})
}

func TestTypedReply(t *testing.T) {
	ctx := context.Background()
	st, _, sv, as := mustDemo(t)
	sess, _, err := st.Enter(ctx, sv, "lean=left", respondent("R-TYPED", "left"), as)
	if err != nil {
		t.Fatal(err)
	}
	allow := func([]store.Turn, bool) error { return nil }
	t.Run("OKMeasuresStored", func(t *testing.T) {
		want := flags.Typing{TypingMS: 8200, Keystrokes: 47, Pastes: 1, HiddenCount: 2}
		a, err := st.AddTypedReply(ctx, sess, "a reply typed in the page", "t1", &want, allow)
		if err != nil {
			t.Fatal(err)
		}
		turns, err := st.Turns(ctx, sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		got := turns[a.Turn.Index].Typing
		if got == nil || *got != want {
			t.Fatalf("got typing %+v, want %+v", got, want)
		}
	})
	t.Run("OKZeroMeasuresAreNotMissing", func(t *testing.T) {
		a, err := st.AddTypedReply(ctx, sess, "a reply with nothing typed", "t2", &flags.Typing{}, allow)
		if err != nil {
			t.Fatal(err)
		}
		turns, _ := st.Turns(ctx, sess.ID)
		if got := turns[a.Turn.Index].Typing; got == nil || *got != (flags.Typing{}) {
			t.Fatalf("got typing %+v, want zeros", got)
		}
	})
	t.Run("OKWithoutMeasures", func(t *testing.T) {
		a, err := st.AddReply(ctx, sess, "a reply from an older page", "t3", allow)
		if err != nil {
			t.Fatal(err)
		}
		turns, _ := st.Turns(ctx, sess.ID)
		if got := turns[a.Turn.Index].Typing; got != nil {
			t.Fatalf("got typing %+v, want none", got)
		}
	})
	t.Run("ErrNegativeMeasure", func(t *testing.T) {
		before, _ := st.Turns(ctx, sess.ID)
		_, err := st.AddTypedReply(ctx, sess, "a reply with a bad measure", "t4", &flags.Typing{Pastes: -1}, allow)
		var fe *flags.FieldError
		if !errors.As(err, &fe) || fe.Field != "typing.pastes" {
			t.Fatalf("got %v, want a field error on typing.pastes", err)
		}
		after, _ := st.Turns(ctx, sess.ID)
		if len(after) != len(before) {
			t.Fatalf("a refused reply changed the turns from %d to %d", len(before), len(after))
		}
	})
}
