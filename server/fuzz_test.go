package server_test

import (
	"bytes"
	"context"
	"encoding/json"
	"net/http"
	"net/http/httptest"
	"slices"
	"strings"
	"testing"
)

// FuzzReplyBody sends arbitrary bodies as a respondent's reply. The server
// must answer with JSON and one of the statuses of the README (200, 400,
// 409, 413, 422), never a 500; a refused body changes nothing; an accepted
// one stores exactly the decoded text. Seeds are in
// testdata/fuzz/FuzzReplyBody.
func FuzzReplyBody(f *testing.F) {
	for _, seed := range []string{
		`{"text":"When is the first ferry?","client_id":"a1"}`,
		`{"text":"no id given here"}`,
		`{"text":"<script>alert(1)</script> hello there","client_id":"x"}`,
		`{"text":"caf\u00e9 au lait please","client_id":"u-1"}`,
		`{"text":"one","client_id":"short"}`,
		`{"text":"two words","client_id":"dup"}{"x":1}`,
		`{"text":null,"client_id":"n"}`,
		`{"text":"a b","client_id":"` + strings.Repeat("z", 65) + `"}`,
		`[]`, ``, `{`, "\xff\xfe",
	} {
		f.Add([]byte(seed))
	}
	arm := strings.Replace(chatArm, "replies: {min: 2, max: 3, min_words: 2, max_chars: 200}", "replies: {min: 1, max: 100, min_words: 2, max_chars: 200}", 1)
	arm = strings.Replace(arm, "    opening: true\n", "", 1)
	fx := newFixture(f, studyYAML("harrow-fuzz", `bot: {kind: scripted}`, arm), nil)
	tok := fx.enter("R-FUZZ", "left")
	sess, err := fx.st.SessionByToken(context.Background(), tok)
	if err != nil {
		f.Fatal(err)
	}
	h := fx.srv.Handler()
	allowed := []int{200, 400, 409, 413, 422}
	f.Fuzz(func(t *testing.T, body []byte) {
		before, err := fx.st.Turns(context.Background(), sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		req := httptest.NewRequest("POST", "/c/"+tok+"/reply", bytes.NewReader(body))
		req.Header.Set("Accept", "application/json")
		rec := httptest.NewRecorder()
		h.ServeHTTP(rec, req)
		if !slices.Contains(allowed, rec.Code) {
			t.Fatalf("got status %d, want one of %v; body %s", rec.Code, allowed, rec.Body.String())
		}
		if !json.Valid(rec.Body.Bytes()) {
			t.Fatalf("got a non-JSON answer %q", rec.Body.String())
		}
		after, err := fx.st.Turns(context.Background(), sess.ID)
		if err != nil {
			t.Fatal(err)
		}
		if rec.Code != http.StatusOK {
			if len(after) != len(before) {
				t.Fatalf("refused with %d but turns went from %d to %d", rec.Code, len(before), len(after))
			}
			return
		}
		var sent struct {
			Text     string `json:"text"`
			ClientID string `json:"client_id"`
		}
		if err := json.Unmarshal(body, &sent); err != nil {
			t.Fatalf("accepted a body that does not decode: %v", err)
		}
		if len(after) == len(before) {
			return // a resend of a stored client id
		}
		if len(after) != len(before)+2 || after[len(before)].Text != sent.Text || after[len(before)+1].Role != "assistant" {
			t.Fatalf("accepted reply: got %d new turns, the first %q, want 2 with %q", len(after)-len(before), after[len(before)].Text, sent.Text)
		}
	})
}
