package responder

import (
	"context"
	"errors"
	"strings"
	"testing"
	"time"
	"unicode/utf8"
)

// Scripts are fictional replies about the Alder Falls greenway.
var testScripts = map[string][]string{
	"debate": {
		"The greenway would link the library to the old mill.",
		"Some residents worry about parking near the river.",
		"What would change your mind about it?",
	},
	"chit-chat": {"Lovely weather in Alder Falls lately, isn't it?"},
}

func conversation(assistantTurns int) []Message {
	var ms []Message
	for i := range assistantTurns {
		ms = append(ms, Message{Role: RoleAssistant, Text: "turn"}, Message{Role: RoleUser, Text: strings.Repeat("word ", i+1)})
	}
	return ms
}

func TestScriptedCycles(t *testing.T) {
	t.Parallel()
	s := NewScripted(ScriptedConfig{Replies: testScripts})
	want := testScripts["debate"]
	for n := range 7 {
		res, err := s.Respond(context.Background(), Request{Arm: "debate", Messages: conversation(n)}, nil)
		if err != nil {
			t.Fatalf("turn %d: %v", n, err)
		}
		if res.Text != want[n%len(want)] {
			t.Errorf("turn %d: got %q, want %q", n, res.Text, want[n%len(want)])
		}
	}
}

func TestScriptedDeterministic(t *testing.T) {
	t.Parallel()
	req := Request{Arm: "debate", System: "Discuss the greenway.", Messages: conversation(2), Params: Params{Temperature: ptr(0.3)}}
	a, errA := NewScripted(ScriptedConfig{Replies: testScripts, Chunks: 3}).Respond(context.Background(), req, nil)
	b, errB := NewScripted(ScriptedConfig{Replies: testScripts, Chunks: 3}).Respond(context.Background(), req, nil)
	if errA != nil || errB != nil {
		t.Fatalf("Respond: %v, %v", errA, errB)
	}
	a.ModelTime, b.ModelTime = 0, 0
	if a != b {
		t.Errorf("two responders disagree:\n%+v\n%+v", a, b)
	}
	if a.ModelRequested != DefaultScriptedModel || a.ModelReported != DefaultScriptedModel || a.FinishReason != "stop" {
		t.Errorf("got requested %q reported %q finish %q, want scripted, scripted, stop", a.ModelRequested, a.ModelReported, a.FinishReason)
	}
	// System 3 words, assistant turns 1 word each, user turns 1 and 2 words.
	if a.PromptTokens != 3+1+1+1+2 || a.CompletionTokens != 7 {
		t.Errorf("tokens: got %d/%d, want 8/7", a.PromptTokens, a.CompletionTokens)
	}
	audit := req
	audit.Params.Model = DefaultScriptedModel
	body, err := RequestBody(audit)
	if err != nil {
		t.Fatal(err)
	}
	if a.RequestSHA256 != sha256Hex(body) {
		t.Errorf("RequestSHA256: got %s, want the hash of the request body %s", a.RequestSHA256, sha256Hex(body))
	}
	if !strings.HasPrefix(a.Fingerprint, "script-") {
		t.Errorf("Fingerprint: got %q, want a script- prefix", a.Fingerprint)
	}
	other, _ := NewScripted(ScriptedConfig{Replies: testScripts}).Respond(context.Background(), Request{Arm: "chit-chat"}, nil)
	if other.Fingerprint == a.Fingerprint {
		t.Errorf("Fingerprint: arms with different scripts share %q", a.Fingerprint)
	}
}

func TestScriptedModelAndFallback(t *testing.T) {
	t.Parallel()
	s := NewScripted(ScriptedConfig{Replies: testScripts, Fallback: []string{"Tell me more."}, Model: "script-birch"})
	res, err := s.Respond(context.Background(), Request{Arm: "unlisted", Params: Params{Model: "alder-chat-1"}}, nil)
	if err != nil {
		t.Fatal(err)
	}
	if res.Text != "Tell me more." || res.ModelRequested != "alder-chat-1" || res.ModelReported != "script-birch" {
		t.Errorf("got %q requested %q reported %q, want the fallback, alder-chat-1, script-birch", res.Text, res.ModelRequested, res.ModelReported)
	}
	res, err = NewScripted(ScriptedConfig{}).Respond(context.Background(), Request{Arm: "any"}, nil)
	if err != nil || res.Text != defaultScript[0] {
		t.Errorf("built-in default: got %q, %v, want %q", res.Text, err, defaultScript[0])
	}
}

func TestScriptedChunks(t *testing.T) {
	t.Parallel()
	for _, chunks := range []int{1, 2, 3, 5, 50} {
		s := NewScripted(ScriptedConfig{Replies: testScripts, Chunks: chunks})
		sink := &recordSink{}
		res, err := s.Respond(context.Background(), Request{Arm: "debate"}, sink)
		if err != nil {
			t.Fatal(err)
		}
		if sink.text() != res.Text || res.Text != testScripts["debate"][0] {
			t.Errorf("chunks %d: sink shows %q, want %q", chunks, sink.text(), res.Text)
		}
		// Word boundaries while there are enough words, runes beyond that.
		if want := min(chunks, utf8.RuneCountInString(res.Text)); len(sink.list()) != want {
			t.Errorf("chunks %d: got %d pieces, want %d", chunks, len(sink.list()), want)
		}
	}
}

func TestSplitChunks(t *testing.T) {
	t.Parallel()
	for _, tc := range []struct {
		text string
		n    int
		want []string
	}{
		{"", 3, nil},
		{"one two three four", 1, []string{"one two three four"}},
		{"one two three four", 2, []string{"one two ", "three four"}},
		{"one two three four", 4, []string{"one ", "two ", "three ", "four"}},
		{"  lead and  trail  ", 2, []string{"  lead ", "and  trail  "}},
		{"Grüße", 2, []string{"Gr", "üße"}},
		{"añ", 5, []string{"a", "ñ"}},
		{"日本語の文", 3, []string{"日", "本語", "の文"}},
		{"a\nb\tc", 3, []string{"a\n", "b\t", "c"}},
	} {
		got := SplitChunks(tc.text, tc.n)
		if strings.Join(got, "|") != strings.Join(tc.want, "|") || len(got) != len(tc.want) {
			t.Errorf("SplitChunks(%q, %d): got %q, want %q", tc.text, tc.n, got, tc.want)
		}
	}
}

func FuzzSplitChunks(f *testing.F) {
	f.Add("The greenway would link the library to the old mill.", 4)
	f.Add("日本語 の 文", 9)
	f.Fuzz(func(t *testing.T, text string, n int) {
		n = n%64 + 1
		if n < 1 {
			n += 64
		}
		got := SplitChunks(text, n)
		if strings.Join(got, "") != text {
			t.Fatalf("SplitChunks(%q, %d): pieces %q do not rebuild the text", text, n, got)
		}
		if len(got) > n {
			t.Fatalf("SplitChunks(%q, %d): got %d pieces, want at most %d", text, n, len(got), n)
		}
		for _, p := range got {
			if p == "" || (utf8.ValidString(text) && !utf8.ValidString(p)) {
				t.Fatalf("SplitChunks(%q, %d): bad piece %q", text, n, p)
			}
		}
	})
}

func TestScriptedCanceledDuringDelay(t *testing.T) {
	t.Parallel()
	// The delay is long so that only cancellation can end the call.
	s := NewScripted(ScriptedConfig{Replies: testScripts, Chunks: 3, Delay: time.Hour})
	ctx, cancel := context.WithCancel(context.Background())
	go cancel()
	sink := &recordSink{}
	_, err := s.Respond(ctx, Request{Arm: "debate"}, sink)
	var e *Error
	if !errors.As(err, &e) || e.Kind != KindCanceled || !errors.Is(err, context.Canceled) {
		t.Fatalf("got %v, want a canceled *Error wrapping context.Canceled", err)
	}
	if len(sink.list()) != 0 {
		t.Errorf("sink: got %q, want nothing before the first delay ends", sink.list())
	}
}

func TestScriptedDelayStreams(t *testing.T) {
	t.Parallel()
	s := NewScripted(ScriptedConfig{Replies: testScripts, Chunks: 2, Delay: 20 * time.Millisecond})
	sink := &recordSink{}
	res, err := s.Respond(context.Background(), Request{Arm: "chit-chat"}, sink)
	if err != nil {
		t.Fatal(err)
	}
	if len(sink.list()) != 2 || sink.text() != res.Text {
		t.Errorf("sink: got %q, want two pieces making %q", sink.list(), res.Text)
	}
}

func TestScriptedBadRole(t *testing.T) {
	t.Parallel()
	_, err := NewScripted(ScriptedConfig{}).Respond(context.Background(), Request{Messages: []Message{{Role: "tool", Text: "x"}}}, Discard)
	var e *Error
	if !errors.As(err, &e) || e.Kind != KindClientError {
		t.Errorf("got %v, want a client_error *Error", err)
	}
}

func BenchmarkScriptedRespond(b *testing.B) {
	s := NewScripted(ScriptedConfig{Replies: testScripts, Chunks: 4})
	req := Request{Arm: "debate", System: "Discuss the greenway.", Messages: conversation(3), Params: Params{Model: "alder-chat-1", Seed: ptr(7)}}
	ctx := context.Background()
	b.ReportAllocs()
	for b.Loop() {
		if _, err := s.Respond(ctx, req, Discard); err != nil {
			b.Fatal(err)
		}
	}
}
