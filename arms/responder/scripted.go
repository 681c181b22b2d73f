package responder

import (
	"context"
	"encoding/json"
	"fmt"
	"strings"
	"time"
	"unicode"
	"unicode/utf8"
)

// DefaultScriptedModel is the model name the scripted responder reports
// unless configured otherwise.
const DefaultScriptedModel = "scripted"

// defaultScript serves arms that have no script of their own when no
// fallback is configured: neutral replies that keep a demo conversation going.
var defaultScript = []string{
	"Thank you for sharing that. What matters most to you about this question?",
	"That is a helpful point. Could you say a little more about why you see it that way?",
	"I understand. Is there anything that might change your view, in either direction?",
	"Thank you, that is clear. Is there anything else you would like to add?",
}

// ScriptedConfig fixes what the scripted responder says.
type ScriptedConfig struct {
	Replies  map[string][]string // per arm name, in order
	Fallback []string            // for arms not listed; a built-in neutral script if empty
	Chunks   int                 // streamed pieces per reply (default 1 = whole reply at once)
	Delay    time.Duration       // total time per reply, spread evenly between chunks (0 = none)
	Model    string              // reported model name (default DefaultScriptedModel)
}

// Scripted is an offline, deterministic Responder: the reply to a request
// depends only on its arm and on how many assistant turns it already holds.
// It serves the demo, tests and benchmarks, and is safe for concurrent use.
type Scripted struct {
	cfg      ScriptedConfig
	scripts  map[string]script
	fallback script
}

// script is one arm's replies, with a fingerprint identifying their content
// so an auditor can tell which script produced a transcript.
type script struct {
	replies     []string
	fingerprint string
}

func newScript(replies []string) script {
	r := append([]string(nil), replies...)
	b, _ := json.Marshal(r) // a []string always encodes
	return script{replies: r, fingerprint: "script-" + sha256Hex(b)[:16]}
}

// NewScripted builds a scripted responder; it copies cfg's slices and maps.
func NewScripted(cfg ScriptedConfig) *Scripted {
	if cfg.Chunks < 1 {
		cfg.Chunks = 1
	}
	if cfg.Delay < 0 {
		cfg.Delay = 0
	}
	if cfg.Model == "" {
		cfg.Model = DefaultScriptedModel
	}
	s := &Scripted{scripts: make(map[string]script, len(cfg.Replies))}
	for arm, replies := range cfg.Replies {
		if len(replies) > 0 {
			s.scripts[arm] = newScript(replies)
		}
	}
	if len(cfg.Fallback) > 0 {
		s.fallback = newScript(cfg.Fallback)
	} else {
		s.fallback = newScript(defaultScript)
	}
	cfg.Replies, cfg.Fallback = nil, nil
	s.cfg = cfg
	return s
}

// Respond sends reply n of the arm's script, n being the number of assistant
// messages already in req.Messages, cycling when the script runs out.
func (s *Scripted) Respond(ctx context.Context, req Request, sink Sink) (Result, error) {
	start := time.Now()
	sink = sinkOrDiscard(sink)
	res := Result{ModelRequested: req.Params.Model}
	if res.ModelRequested == "" {
		res.ModelRequested = s.cfg.Model
	}
	fail := func(kind string, err error) (Result, error) {
		res.ModelTime = time.Since(start)
		return res, &Error{Kind: kind, Attempts: 1, Err: err}
	}

	// Hash the request a hosted endpoint would have received, naming the
	// model the way the audit log does.
	audit := req
	audit.Params.Model = res.ModelRequested
	body, err := RequestBody(audit)
	if err != nil {
		return fail(KindClientError, err)
	}

	sc, ok := s.scripts[req.Arm]
	if !ok {
		sc = s.fallback
	}
	n := 0
	prompt := wordCount(req.System)
	for _, m := range req.Messages {
		if m.Role == RoleAssistant {
			n++
		}
		prompt += wordCount(m.Text)
	}
	text := sc.replies[n%len(sc.replies)]

	pieces := SplitChunks(text, s.cfg.Chunks)
	var wait time.Duration
	if len(pieces) > 0 {
		wait = s.cfg.Delay / time.Duration(len(pieces))
	}
	for _, p := range pieces {
		if err := sleepCtx(ctx, wait); err != nil {
			return fail(KindCanceled, fmt.Errorf("scripted reply: %w", err))
		}
		sink.Chunk(p)
	}
	if err := ctx.Err(); err != nil {
		return fail(KindCanceled, fmt.Errorf("scripted reply: %w", err))
	}

	res.Text = text
	res.ModelReported = s.cfg.Model
	res.Fingerprint = sc.fingerprint
	res.PromptTokens = prompt
	res.CompletionTokens = wordCount(text)
	res.RequestSHA256 = sha256Hex(body)
	res.FinishReason = "stop"
	res.ModelTime = time.Since(start)
	return res, nil
}

func wordCount(s string) int { return len(strings.Fields(s)) }

// SplitChunks cuts text into at most n pieces whose concatenation is text,
// cutting at word starts where there are enough words and between runes
// otherwise. It returns fewer pieces when text has fewer runes than n, and
// none for empty text.
func SplitChunks(text string, n int) []string {
	if text == "" {
		return nil
	}
	if n <= 1 {
		return []string{text}
	}
	// Byte offsets where a word begins (a non-space rune after a space),
	// never 0, so that every piece but the first starts with a word.
	var cuts []int
	prevSpace := false
	for i, r := range text {
		space := unicode.IsSpace(r)
		if i > 0 && !space && prevSpace {
			cuts = append(cuts, i)
		}
		prevSpace = space
	}
	if len(cuts)+1 < n {
		// Too few words: cut between runes instead.
		cuts = cuts[:0]
		for i := range text {
			if i > 0 {
				cuts = append(cuts, i)
			}
		}
		if runes := utf8.RuneCountInString(text); runes < n {
			n = runes
		}
	}
	// Choose n-1 of the possible cuts, evenly spread.
	segments := len(cuts) + 1
	out := make([]string, 0, n)
	from := 0
	for k := 1; k < n; k++ {
		at := cuts[k*segments/n-1]
		out = append(out, text[from:at])
		from = at
	}
	return append(out, text[from:])
}
