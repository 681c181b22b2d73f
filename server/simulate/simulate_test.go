package simulate_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"net/http"
	"net/http/httptest"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"trialogue/arms"
	"trialogue/arms/responder"
	"trialogue/server"
	"trialogue/server/simulate"
	"trialogue/store"
	"trialogue/web"
)

const simStudy = `id: harrow-sim
title: Harrow Bay tide-mill footpath
covariates:
  - {name: lean, type: choice, values: [left, right], required: true}
  - {name: age, type: integer, min: 18, max: 99}
strata: [lean]
allocation: {blocks: [2], arms: {talk: 1, note: 1}}
endpoints:
  bot: {kind: scripted, chunks: 3}
arms:
  talk:
    kind: chat
    endpoint: bot
    replies: {min: 3, max: 3, min_words: 2}
    system: You talk with a {{.lean}} resident about the footpath.
    script: ["The footpath follows the tide-mill wall.", "It is built on low piles.", "It closes at ten.", "Thank you."]
  note:
    kind: message
    endpoint: bot
    system: Write a note.
    prompt: Write one note about the footpath.
    script: ["The footpath opens in spring."]
return: "https://survey.example.org/back?rid={{.rid}}&code={{.code}}&arm={{.arm_code}}"
`

const key = "sim-test-key"

// serve starts a real server on loopback with the synthetic key set.
func serve(t *testing.T) (*store.Store, string) {
	t.Helper()
	ctx := context.Background()
	def, err := arms.Parse("sim.yaml", []byte(simStudy))
	if err != nil {
		t.Fatal(err)
	}
	st, err := store.Open(ctx, filepath.Join(t.TempDir(), "sim.db"), store.Options{})
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { st.Close() })
	assets, err := web.Load()
	if err != nil {
		t.Fatal(err)
	}
	srv := server.New(st, assets, server.Config{Logger: slog.New(slog.DiscardHandler), SyntheticKey: key})
	if _, err := srv.AddStudy(ctx, def, []byte(simStudy)); err != nil {
		t.Fatal(err)
	}
	hs := httptest.NewServer(srv.Handler())
	t.Cleanup(hs.Close)
	return st, hs.URL
}

func personas(t *testing.T) []simulate.Persona {
	t.Helper()
	ps, err := simulate.ParsePersonas("p.yaml", []byte(`personas:
  - name: walker
    weight: 3
    covariates:
      lean: {values: [left, right], weights: [1, 1]}
      age: {min: 30, max: 40}
    replies: ["I walk the bay every morning.", "Will dogs be allowed on it?", "Sounds good to me."]
  - name: skeptic
    covariates:
      lean: {value: right}
    replies: ["I doubt it is worth the money.", "Who maintains the timber?", "I remain unconvinced."]
`), true)
	if err != nil {
		t.Fatal(err)
	}
	return ps
}

func TestRun(t *testing.T) {
	st, url := serve(t)
	ctx := context.Background()
	rep, err := simulate.Run(ctx, simulate.Config{URL: url, Study: "harrow-sim", Respondents: 20, Concurrency: 5,
		Personas: personas(t), SyntheticKey: key, Seed: 7, RIDPrefix: "sim-a-"})
	if err != nil {
		t.Fatal(err)
	}
	if rep.ErrorCount() != 0 || rep.Completed != 20 {
		t.Fatalf("got %d completed and errors %v, want 20 and none", rep.Completed, rep.Errors)
	}
	counts, err := st.ArmCounts(ctx, "harrow-sim", store.SyntheticOnly)
	if err != nil {
		t.Fatal(err)
	}
	wantArms := map[string]int{"A1": counts["talk"], "A2": counts["note"]}
	if fmt.Sprint(rep.Arms) != fmt.Sprint(wantArms) || counts["talk"]+counts["note"] != 20 {
		t.Fatalf("arms: got %v in the report and %v stored", rep.Arms, counts)
	}
	if real, _ := st.SessionsOf(ctx, "harrow-sim", store.RealOnly); len(real) != 0 {
		t.Fatalf("real sessions: got %d, want 0 (all synthetic)", len(real))
	}
	if got, want := rep.Steps["reply"].Count, 3*counts["talk"]; got != want {
		t.Fatalf("replies: got %d, want %d", got, want)
	}
	if got, want := rep.Turns, 3*counts["talk"]+counts["note"]; got != want || rep.Overhead.Count != want {
		t.Fatalf("model turns: got %d (overhead %d), want %d", got, rep.Overhead.Count, want)
	}
	for _, s := range []string{"entry", "page", "state", "finish"} {
		if l := rep.Steps[s]; l.Count != 20 || !(l.P50 <= l.P90 && l.P90 <= l.P99 && l.P99 <= l.Max) {
			t.Fatalf("step %s: got %+v, want 20 ordered percentiles", s, l)
		}
	}
	sessions, _ := st.SessionsOf(ctx, "harrow-sim", store.SyntheticOnly)
	for _, s := range sessions {
		turns, _ := st.Turns(ctx, s.ID)
		want := 1
		if s.Arm == "talk" {
			want = 6
		}
		if len(turns) != want || !s.Finished() {
			t.Fatalf("session %s: got %d turns (finished %v), want %d and finished", s.RID, len(turns), s.Finished(), want)
		}
	}
	t.Run("OKTableAndJSON", func(t *testing.T) {
		var tb, js bytes.Buffer
		if err := rep.WriteTable(&tb); err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(tb.String(), "20 of 20 synthetic respondents completed") || !strings.Contains(tb.String(), "overhead/turn") {
			t.Fatalf("table:\n%s", tb.String())
		}
		if err := rep.WriteJSON(&js); err != nil {
			t.Fatal(err)
		}
		var back simulate.Report
		if err := json.Unmarshal(js.Bytes(), &back); err != nil || back.Completed != 20 || back.Steps["reply"].Count != rep.Steps["reply"].Count {
			t.Fatalf("JSON round trip: got %+v, %v", back, err)
		}
	})
	t.Run("ErrWrongKey", func(t *testing.T) {
		rep, err := simulate.Run(ctx, simulate.Config{URL: url, Study: "harrow-sim", Respondents: 3, Concurrency: 3,
			Personas: personas(t), SyntheticKey: "wrong", RIDPrefix: "sim-b-"})
		if err != nil {
			t.Fatal(err)
		}
		if rep.Errors["entry:403"] != 3 || rep.Completed != 0 {
			t.Fatalf("got errors %v, want entry:403 three times", rep.Errors)
		}
		all, _ := st.SessionsOf(ctx, "harrow-sim", store.WithSynthetic)
		if len(all) != 20 {
			t.Fatalf("sessions: got %d, want the 20 from before", len(all))
		}
	})
}

func TestRunRefuses(t *testing.T) {
	good := simulate.Config{URL: "http://127.0.0.1:1", Study: "s", Respondents: 1, Concurrency: 1, Personas: personas(t)}
	for _, tc := range []struct {
		name string
		mod  func(*simulate.Config)
		want string
	}{
		{"ErrNotLoopback", func(c *simulate.Config) { c.URL = "http://192.0.2.10:8080" }, "not a loopback"},
		{"ErrNotHTTP", func(c *simulate.Config) { c.URL = "ftp://127.0.0.1/" }, "not an http"},
		{"ErrNoRespondents", func(c *simulate.Config) { c.Respondents = 0 }, "respondents must be"},
		{"ErrTooManyAtOnce", func(c *simulate.Config) { c.Concurrency = simulate.MaxConcurrency + 1 }, "concurrency must be"},
		{"ErrNoPersonas", func(c *simulate.Config) { c.Personas = nil }, "no personas"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			c := good
			tc.mod(&c)
			if _, err := simulate.Run(context.Background(), c); err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("got %v, want an error saying %q", err, tc.want)
			}
		})
	}
}

func TestParsePersonas(t *testing.T) {
	t.Run("OKFile", func(t *testing.T) {
		ps, err := simulate.LoadPersonas("../../testdata/personas/quillhaven.yaml", true)
		if err != nil || len(ps) != 3 {
			t.Fatalf("got %d personas, %v; want 3", len(ps), err)
		}
	})
	for _, tc := range []struct{ name, yaml, want string }{
		{"ErrUnknownField", "personas:\n  - name: a\n    replies: [\"x y\"]\n    colour: red\n", "colour"},
		{"ErrMinAboveMax", "personas:\n  - name: a\n    replies: [\"x y\"]\n    covariates: {age: {min: 50, max: 20}}\n", "min 50 is greater than max 20"},
		{"ErrTwoForms", "personas:\n  - name: a\n    replies: [\"x y\"]\n    covariates: {lean: {value: left, values: [right]}}\n", "exactly one of"},
		{"ErrWeightsCount", "personas:\n  - name: a\n    replies: [\"x y\"]\n    covariates: {lean: {values: [left, right], weights: [1]}}\n", "1 weights for 2 values"},
		{"ErrNoReplies", "personas:\n  - name: a\n", "replies are required"},
		{"ErrNoName", "personas:\n  - replies: [\"x y\"]\n", "a name is required"},
		{"ErrEmpty", "personas: []\n", "no personas"},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if _, err := simulate.ParsePersonas("p.yaml", []byte(tc.yaml), true); err == nil || !strings.Contains(err.Error(), tc.want) {
				t.Fatalf("got %v, want an error saying %q", err, tc.want)
			}
		})
	}
}

// personaModel is a local OpenAI-compatible endpoint (the chat-completions
// streaming format go-openai parses) that plays a persona.
type personaModel struct {
	mu     sync.Mutex
	bodies []string
}

func (m *personaModel) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	b, _ := io.ReadAll(r.Body)
	m.mu.Lock()
	m.bodies = append(m.bodies, string(b))
	n := len(m.bodies)
	m.mu.Unlock()
	w.Header().Set("Content-Type", "text/event-stream")
	fmt.Fprintf(w, "data: {\"id\":\"p\",\"object\":\"chat.completion.chunk\",\"model\":\"player-2027\",\"choices\":[{\"index\":0,\"delta\":{\"content\":\"Player reply number %d here.\"}}]}\n\n", n)
	fmt.Fprint(w, "data: {\"id\":\"p\",\"object\":\"chat.completion.chunk\",\"model\":\"player-2027\",\"choices\":[{\"index\":0,\"delta\":{},\"finish_reason\":\"stop\"}]}\n\n")
	fmt.Fprint(w, "data: [DONE]\n\n")
}

func TestRunWithPersonaModel(t *testing.T) {
	st, url := serve(t)
	pm := &personaModel{}
	ms := httptest.NewServer(pm)
	defer ms.Close()
	player, err := responder.NewOpenAI(responder.OpenAIConfig{BaseURL: ms.URL + "/v1", MaxAttempts: 1})
	if err != nil {
		t.Fatal(err)
	}
	defer player.CloseIdleConnections()
	ps, err := simulate.ParsePersonas("p.yaml", []byte("personas:\n  - name: ferry-pilot\n    describe: A retired ferry pilot.\n    covariates: {lean: {value: left}, age: {value: \"71\"}}\n"), false)
	if err != nil {
		t.Fatal(err)
	}
	rep, err := simulate.Run(context.Background(), simulate.Config{URL: url, Study: "harrow-sim", Respondents: 4, Concurrency: 2,
		Personas: ps, SyntheticKey: key, Player: player, PlayerParams: responder.Params{Model: "player"}, RIDPrefix: "sim-p-"})
	if err != nil || rep.ErrorCount() != 0 || rep.Completed != 4 {
		t.Fatalf("got %v, errors %v, completed %d", err, rep.Errors, rep.Completed)
	}
	sessions, _ := st.SessionsOf(context.Background(), "harrow-sim", store.SyntheticOnly)
	replies := 0
	for _, s := range sessions {
		turns, _ := st.Turns(context.Background(), s.ID)
		for _, tn := range turns {
			if tn.Role == store.RoleRespondent {
				replies++
				if !strings.HasPrefix(tn.Text, "Player reply number") {
					t.Fatalf("a stored reply was not written by the persona model: %q", tn.Text)
				}
			}
		}
	}
	pm.mu.Lock()
	defer pm.mu.Unlock()
	if len(pm.bodies) != replies || replies == 0 {
		t.Fatalf("persona model calls: got %d, want one per stored reply (%d)", len(pm.bodies), replies)
	}
	var req struct {
		Messages []struct{ Role, Content string }
	}
	json.Unmarshal([]byte(pm.bodies[len(pm.bodies)-1]), &req)
	sys := req.Messages[0].Content
	if req.Messages[0].Role != "system" || !strings.Contains(sys, "lean: left") || !strings.Contains(sys, "age: 71") || !strings.Contains(sys, "retired ferry pilot") {
		t.Fatalf("the persona's prompt lacks its covariates or description: %q", sys)
	}
	last := req.Messages[len(req.Messages)-1]
	if last.Role != "user" || !strings.Contains(simStudy, last.Content) {
		t.Fatalf("the persona model's last message: got %s %q, want the study model's text as user", last.Role, last.Content)
	}
}
