package responder

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
	"time"
)

// The fake endpoint below speaks the OpenAI chat-completions streaming
// format as go-openai v1.43.0 parses it (stream_reader.go): server-sent
// event lines "data: {json}" each followed by a blank line, chunks of object
// "chat.completion.chunk" whose choices carry delta.content and a
// finish_reason, with stream_options.include_usage a last chunk with empty
// choices and a usage object, and the terminator "data: [DONE]". Error
// answers are JSON {"error": {...}} with a non-2xx status. All names, models
// and texts are fictional.

// step answers one request to the fake endpoint.
type step func(w http.ResponseWriter, r *http.Request)

// endpoint is a loopback chat-completions server that answers its n-th
// request with steps[n], repeating the last step.
type endpoint struct {
	srv *httptest.Server

	mu      sync.Mutex
	steps   []step
	bodies  [][]byte
	headers []http.Header
}

func newEndpoint(tb testing.TB, steps ...step) *endpoint {
	tb.Helper()
	e := &endpoint{steps: steps}
	e.srv = httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.URL.Path != "/v1/chat/completions" {
			http.Error(w, `{"error":{"message":"no such route"}}`, http.StatusNotFound)
			return
		}
		body, err := io.ReadAll(r.Body)
		if err != nil {
			http.Error(w, "read body", http.StatusBadRequest)
			return
		}
		e.mu.Lock()
		e.bodies = append(e.bodies, body)
		e.headers = append(e.headers, r.Header.Clone())
		s := e.steps[min(len(e.bodies), len(e.steps))-1]
		e.mu.Unlock()
		s(w, r)
	}))
	tb.Cleanup(e.srv.Close)
	return e
}

func (e *endpoint) baseURL() string { return e.srv.URL + "/v1" }

func (e *endpoint) requests() [][]byte {
	e.mu.Lock()
	defer e.mu.Unlock()
	return append([][]byte(nil), e.bodies...)
}

func (e *endpoint) header(i int) http.Header {
	e.mu.Lock()
	defer e.mu.Unlock()
	return e.headers[i]
}

// streamSpec describes a well-formed streamed answer.
type streamSpec struct {
	model, fingerprint string
	parts              []string
	finish             string // "" = the stream stops without a finish reason
	prompt, completion int    // usage; sent when finish is set
	done               bool   // send data: [DONE]
}

func chunkJSON(model, fp string, choices []map[string]any, usage map[string]any) string {
	c := map[string]any{
		"id":                 "chatcmpl-fict-1",
		"object":             "chat.completion.chunk",
		"created":            1900000000,
		"model":              model,
		"system_fingerprint": fp,
		"choices":            choices,
	}
	if usage != nil {
		c["usage"] = usage
	}
	b, err := json.Marshal(c)
	if err != nil {
		panic(err)
	}
	return string(b)
}

func writeEvent(w http.ResponseWriter, data string) {
	fmt.Fprintf(w, "data: %s\n\n", data)
	if f, ok := w.(http.Flusher); ok {
		f.Flush()
	}
}

func startStream(w http.ResponseWriter) {
	w.Header().Set("Content-Type", "text/event-stream")
	w.WriteHeader(http.StatusOK)
}

func streamStep(s streamSpec) step {
	return func(w http.ResponseWriter, r *http.Request) {
		startStream(w)
		for i, p := range s.parts {
			delta := map[string]any{"content": p}
			if i == 0 {
				delta["role"] = "assistant"
			}
			writeEvent(w, chunkJSON(s.model, s.fingerprint, []map[string]any{{"index": 0, "delta": delta, "finish_reason": nil}}, nil))
		}
		if s.finish != "" {
			writeEvent(w, chunkJSON(s.model, s.fingerprint, []map[string]any{{"index": 0, "delta": map[string]any{}, "finish_reason": s.finish}}, nil))
			writeEvent(w, chunkJSON(s.model, s.fingerprint, []map[string]any{}, map[string]any{
				"prompt_tokens": s.prompt, "completion_tokens": s.completion, "total_tokens": s.prompt + s.completion,
			}))
		}
		if s.done {
			writeEvent(w, "[DONE]")
		}
	}
}

// okStep is a complete answer from the fictional model "alder-chat-1".
func okStep(parts ...string) step {
	return streamStep(streamSpec{
		model: "alder-chat-1-2027-03", fingerprint: "fp_alder_0042",
		parts: parts, finish: "stop", prompt: 31, completion: 9, done: true,
	})
}

func statusStep(code int, retryAfter string, body string) step {
	return func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "application/json")
		if retryAfter != "" {
			w.Header().Set("Retry-After", retryAfter)
		}
		w.WriteHeader(code)
		io.WriteString(w, body)
	}
}

func errorBody(msg, typ string) string {
	b, _ := json.Marshal(map[string]any{"error": map[string]any{"message": msg, "type": typ}})
	return string(b)
}

// hangStep sends the given parts and then waits for the client to go away.
func hangStep(parts ...string) step {
	return func(w http.ResponseWriter, r *http.Request) {
		if len(parts) > 0 {
			startStream(w)
			for _, p := range parts {
				writeEvent(w, chunkJSON("alder-chat-1", "", []map[string]any{{"index": 0, "delta": map[string]any{"content": p}, "finish_reason": nil}}, nil))
			}
		}
		<-r.Context().Done()
	}
}

// recordSink records what a Sink receives.
type recordSink struct {
	mu      sync.Mutex
	events  []string
	onChunk func()
}

func (s *recordSink) Chunk(text string) {
	s.mu.Lock()
	s.events = append(s.events, "chunk:"+text)
	f := s.onChunk
	s.mu.Unlock()
	if f != nil {
		f()
	}
}

func (s *recordSink) Reset() {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.events = append(s.events, "reset")
}

func (s *recordSink) list() []string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]string(nil), s.events...)
}

func (s *recordSink) count(ev string) int {
	n := 0
	for _, e := range s.list() {
		if e == ev {
			n++
		}
	}
	return n
}

// text is the reply as a streaming page would show it: chunks since the
// last reset.
func (s *recordSink) text() string {
	var b strings.Builder
	for _, e := range s.list() {
		if e == "reset" {
			b.Reset()
			continue
		}
		b.WriteString(strings.TrimPrefix(e, "chunk:"))
	}
	return b.String()
}

// sleepRecorder is the Sleep seam: it records the waits asked for and
// returns at once.
type sleepRecorder struct {
	mu    sync.Mutex
	waits []time.Duration
}

func (s *sleepRecorder) sleep(ctx context.Context, d time.Duration) error {
	s.mu.Lock()
	s.waits = append(s.waits, d)
	s.mu.Unlock()
	return ctx.Err()
}

func (s *sleepRecorder) list() []time.Duration {
	s.mu.Lock()
	defer s.mu.Unlock()
	return append([]time.Duration(nil), s.waits...)
}

func ptr[T any](v T) *T { return &v }

// sampleRequest is a fictional conversation about the Alder Falls greenway.
func sampleRequest() Request {
	return Request{
		Arm:    "debate",
		System: "You are talking with a resident of Alder Falls about the proposed riverside greenway.",
		Messages: []Message{
			{Role: RoleAssistant, Text: "Hello! What do you think of the greenway plan?"},
			{Role: RoleUser, Text: "I worry about parking near the old mill."},
		},
		Params: Params{Model: "alder-chat-1", Temperature: ptr(0.7), TopP: ptr(0.9), MaxTokens: 200, Seed: ptr(7)},
	}
}
