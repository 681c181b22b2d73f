// Package responder writes the model's turns of a Trialogue conversation:
// either by calling an OpenAI-compatible chat-completions endpoint with
// streaming, retries and an audit record of each call, or by replaying a
// fixed script offline for demos, tests and benchmarks.
package responder

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"strings"
	"time"

	openai "github.com/sashabaranov/go-openai"
)

// Roles a Message may carry.
const (
	RoleAssistant = "assistant"
	RoleUser      = "user"
)

// Message is one turn of the conversation as the model sees it.
type Message struct {
	Role string // RoleAssistant or RoleUser
	Text string
}

// Params are the model parameters a study fixes for an arm.
type Params struct {
	Model       string
	Temperature *float64 // nil = endpoint default
	TopP        *float64 // nil = endpoint default
	MaxTokens   int      // 0 = endpoint default
	Seed        *int     // nil = none sent
}

// Request is one model call: the rendered system prompt, the session's
// conversation so far, the parameters.
type Request struct {
	Arm      string
	System   string // empty = no system message is sent
	Messages []Message
	Params   Params
}

// Result is what the audit log records about a completed call.
type Result struct {
	Text             string
	ModelRequested   string
	ModelReported    string // as the endpoint named itself in the stream; may differ from ModelRequested
	Fingerprint      string // the endpoint's system fingerprint, if it sent one
	PromptTokens     int
	CompletionTokens int
	Retries          int    // failed attempts before the one that succeeded
	RequestSHA256    string // hex SHA-256 of the exact HTTP request body of the attempt that succeeded
	FinishReason     string
	ModelTime        time.Duration // wall time spent waiting on the endpoint, all attempts and backoff included
}

// Sink receives the reply as it is generated. Reset is called when an
// attempt fails after chunks were sent and the reply starts over.
type Sink interface {
	Chunk(text string)
	Reset()
}

// Responder writes the model's turn. Implementations are safe for
// concurrent use.
type Responder interface {
	Respond(ctx context.Context, req Request, sink Sink) (Result, error)
}

// Both responders satisfy Responder.
var (
	_ Responder = (*OpenAI)(nil)
	_ Responder = (*Scripted)(nil)
)

// Discard is a Sink that drops everything; Respond also accepts a nil Sink.
var Discard Sink = discard{}

type discard struct{}

func (discard) Chunk(string) {}
func (discard) Reset()       {}

// Kinds of Error, for the server's retry message and the log.
const (
	KindRateLimited = "rate_limited" // 429 on every attempt
	KindServerError = "server_error" // 5xx, or an error object inside the stream
	KindTimeout     = "timeout"      // an attempt exceeded its time limit
	KindCutOff      = "cut_off"      // the stream ended before a finish reason
	KindBadStream   = "bad_stream"   // an event could not be parsed
	KindRefused     = "refused"      // the endpoint could not be reached (connection refused, reset, DNS)
	KindClientError = "client_error" // the endpoint rejected the request (400, 401, 403, 404, ...) or it could not be built; not retried
	KindCanceled    = "canceled"     // the caller's context ended
)

// Error is the failure of a model call after all permitted attempts.
type Error struct {
	Kind     string // one of the Kind constants
	Status   int    // HTTP status of the last attempt, 0 if none was received
	Attempts int    // attempts made, including the last
	Err      error  // cause of the last failed attempt
}

// Error describes the failure without any secret.
func (e *Error) Error() string {
	var b strings.Builder
	fmt.Fprintf(&b, "model call failed: %s after %d attempt(s)", e.Kind, e.Attempts)
	if e.Status != 0 {
		fmt.Fprintf(&b, " (HTTP %d)", e.Status)
	}
	if e.Err != nil {
		b.WriteString(": ")
		b.WriteString(e.Err.Error())
	}
	return b.String()
}

// Unwrap returns the cause of the last failed attempt.
func (e *Error) Unwrap() error { return e.Err }

// Retryable reports whether a later call might succeed, which the server
// uses to choose between "try again" and "this conversation cannot go on".
func (e *Error) Retryable() bool {
	return e.Kind != KindClientError && e.Kind != KindCanceled
}

// usesMaxCompletionTokens reports whether a model family refuses max_tokens
// and takes max_completion_tokens instead (go-openai enforces this client-side).
func usesMaxCompletionTokens(model string) bool {
	for _, p := range []string{"o1", "o3", "o4", "gpt-5"} {
		if strings.HasPrefix(model, p) {
			return true
		}
	}
	return false
}

// sampling converts a study parameter to go-openai's float32 field. The
// field is tagged omitempty, so an exact zero would silently vanish from the
// request and the endpoint default would apply instead; the smallest
// positive float32 is sent in its place, which endpoints treat as zero.
func sampling(v *float64) float32 {
	if v == nil {
		return 0
	}
	if *v == 0 {
		return math.SmallestNonzeroFloat32
	}
	return float32(*v)
}

// ChatRequest builds the chat-completions request Trialogue sends for req:
// the system prompt first (if any), then the conversation, with streaming and
// usage reporting on. Both responders use it, so the scripted responder's
// RequestSHA256 is the hash of the request a hosted endpoint would receive.
func ChatRequest(req Request) (openai.ChatCompletionRequest, error) {
	msgs := make([]openai.ChatCompletionMessage, 0, len(req.Messages)+1)
	if req.System != "" {
		msgs = append(msgs, openai.ChatCompletionMessage{Role: openai.ChatMessageRoleSystem, Content: req.System})
	}
	for i, m := range req.Messages {
		switch m.Role {
		case RoleUser, RoleAssistant:
		default:
			return openai.ChatCompletionRequest{}, fmt.Errorf("build request: message %d has role %q, want %q or %q", i, m.Role, RoleUser, RoleAssistant)
		}
		msgs = append(msgs, openai.ChatCompletionMessage{Role: m.Role, Content: m.Text})
	}
	out := openai.ChatCompletionRequest{
		Model:         req.Params.Model,
		Messages:      msgs,
		Temperature:   sampling(req.Params.Temperature),
		TopP:          sampling(req.Params.TopP),
		Seed:          req.Params.Seed,
		Stream:        true,
		StreamOptions: &openai.StreamOptions{IncludeUsage: true},
	}
	if req.Params.MaxTokens > 0 {
		if usesMaxCompletionTokens(req.Params.Model) {
			out.MaxCompletionTokens = req.Params.MaxTokens
		} else {
			out.MaxTokens = req.Params.MaxTokens
		}
	}
	return out, nil
}

// RequestBody returns the JSON body go-openai sends for req (it marshals the
// request struct with encoding/json).
func RequestBody(req Request) ([]byte, error) {
	cr, err := ChatRequest(req)
	if err != nil {
		return nil, err
	}
	b, err := json.Marshal(cr)
	if err != nil {
		return nil, fmt.Errorf("encode request: %w", err)
	}
	return b, nil
}

func sha256Hex(b []byte) string {
	s := sha256.Sum256(b)
	return hex.EncodeToString(s[:])
}

func sinkOrDiscard(s Sink) Sink {
	if s == nil {
		return Discard
	}
	return s
}
