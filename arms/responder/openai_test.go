package responder

import (
	"context"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"errors"
	"net"
	"net/http"
	"runtime"
	"slices"
	"strings"
	"testing"
	"time"
)

const testKey = "sk-fictional-trialogue-test-key"

func newTestOpenAI(tb testing.TB, baseURL string, mod func(*OpenAIConfig)) (*OpenAI, *sleepRecorder) {
	tb.Helper()
	sl := &sleepRecorder{}
	cfg := OpenAIConfig{
		BaseURL:     baseURL,
		APIKey:      testKey,
		Timeout:     10 * time.Second, // only so that a broken test ends
		MaxAttempts: 4,
		Sleep:       sl.sleep,
	}
	if mod != nil {
		mod(&cfg)
	}
	o, err := NewOpenAI(cfg)
	if err != nil {
		tb.Fatalf("NewOpenAI: %v", err)
	}
	tb.Cleanup(o.CloseIdleConnections)
	return o, sl
}

func asError(t *testing.T, err error) *Error {
	t.Helper()
	var e *Error
	if !errors.As(err, &e) {
		t.Fatalf("got error %v (%T), want *Error", err, err)
	}
	if strings.Contains(err.Error(), testKey) {
		t.Fatalf("error text contains the API key: %v", err)
	}
	return e
}

func TestOpenAIStream(t *testing.T) {
	ep := newEndpoint(t, okStep("Parking ", "near the mill ", "is a fair concern."))
	o, _ := newTestOpenAI(t, ep.baseURL(), nil)
	sink := &recordSink{}
	req := sampleRequest()

	res, err := o.Respond(context.Background(), req, sink)
	if err != nil {
		t.Fatalf("Respond: %v", err)
	}
	if want := "Parking near the mill is a fair concern."; res.Text != want {
		t.Errorf("Text: got %q, want %q", res.Text, want)
	}
	if got, want := sink.list(), []string{"chunk:Parking ", "chunk:near the mill ", "chunk:is a fair concern."}; !slices.Equal(got, want) {
		t.Errorf("sink: got %q, want %q", got, want)
	}
	if res.ModelRequested != "alder-chat-1" || res.ModelReported != "alder-chat-1-2027-03" {
		t.Errorf("models: got requested %q reported %q, want alder-chat-1 and alder-chat-1-2027-03", res.ModelRequested, res.ModelReported)
	}
	if res.Fingerprint != "fp_alder_0042" {
		t.Errorf("Fingerprint: got %q, want fp_alder_0042", res.Fingerprint)
	}
	if res.PromptTokens != 31 || res.CompletionTokens != 9 {
		t.Errorf("usage: got %d/%d, want 31/9", res.PromptTokens, res.CompletionTokens)
	}
	if res.FinishReason != "stop" || res.Retries != 0 {
		t.Errorf("got finish %q retries %d, want stop and 0", res.FinishReason, res.Retries)
	}
	if res.ModelTime <= 0 {
		t.Errorf("ModelTime: got %v, want > 0", res.ModelTime)
	}

	bodies := ep.requests()
	if len(bodies) != 1 {
		t.Fatalf("requests: got %d, want 1", len(bodies))
	}
	sum := sha256.Sum256(bodies[0])
	if want := hex.EncodeToString(sum[:]); res.RequestSHA256 != want {
		t.Errorf("RequestSHA256: got %s, want %s (hash of the body received)", res.RequestSHA256, want)
	}
	// The scripted responder hashes the same builder's output.
	built, err := RequestBody(req)
	if err != nil {
		t.Fatal(err)
	}
	if string(built) != string(bodies[0]) {
		t.Errorf("RequestBody differs from the body sent:\n got %s\nwant %s", built, bodies[0])
	}
	if got := ep.header(0).Get("Authorization"); got != "Bearer "+testKey {
		t.Errorf("Authorization header: got %q, want the bearer key", got)
	}
}

// wireRequest is the part of the chat-completions request body the tests check.
type wireRequest struct {
	Model    string `json:"model"`
	Messages []struct {
		Role    string `json:"role"`
		Content string `json:"content"`
	} `json:"messages"`
	Temperature         *float64 `json:"temperature"`
	TopP                *float64 `json:"top_p"`
	Seed                *int     `json:"seed"`
	MaxTokens           *int     `json:"max_tokens"`
	MaxCompletionTokens *int     `json:"max_completion_tokens"`
	Stream              bool     `json:"stream"`
	StreamOptions       *struct {
		IncludeUsage bool `json:"include_usage"`
	} `json:"stream_options"`
}

func TestOpenAIRequestBody(t *testing.T) {
	t.Run("OK", func(t *testing.T) {
		ep := newEndpoint(t, okStep("Understood."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		req := sampleRequest()
		if _, err := o.Respond(context.Background(), req, nil); err != nil {
			t.Fatalf("Respond: %v", err)
		}
		var got wireRequest
		if err := json.Unmarshal(ep.requests()[0], &got); err != nil {
			t.Fatalf("decode body: %v", err)
		}
		if got.Model != "alder-chat-1" {
			t.Errorf("model: got %q, want alder-chat-1", got.Model)
		}
		if len(got.Messages) != 3 {
			t.Fatalf("messages: got %d, want 3 (system + 2)", len(got.Messages))
		}
		if got.Messages[0].Role != "system" || got.Messages[0].Content != req.System {
			t.Errorf("first message: got %+v, want the system prompt", got.Messages[0])
		}
		for i, m := range req.Messages {
			if g := got.Messages[i+1]; g.Role != m.Role || g.Content != m.Text {
				t.Errorf("message %d: got %+v, want %+v", i, g, m)
			}
		}
		if got.Temperature == nil || *got.Temperature != 0.7 {
			t.Errorf("temperature: got %v, want 0.7", got.Temperature)
		}
		if got.TopP == nil || *got.TopP != 0.9 {
			t.Errorf("top_p: got %v, want 0.9", got.TopP)
		}
		if got.Seed == nil || *got.Seed != 7 {
			t.Errorf("seed: got %v, want 7", got.Seed)
		}
		if got.MaxTokens == nil || *got.MaxTokens != 200 || got.MaxCompletionTokens != nil {
			t.Errorf("max tokens: got max_tokens %v max_completion_tokens %v, want 200 and absent", got.MaxTokens, got.MaxCompletionTokens)
		}
		if !got.Stream || got.StreamOptions == nil || !got.StreamOptions.IncludeUsage {
			t.Errorf("streaming: got stream %v options %+v, want true with include_usage", got.Stream, got.StreamOptions)
		}
	})
	t.Run("OKDefaultsOmitted", func(t *testing.T) {
		ep := newEndpoint(t, okStep("Understood."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		req := Request{Arm: "reflect", Messages: []Message{{Role: RoleUser, Text: "Hello there."}}, Params: Params{Model: "alder-chat-1"}}
		if _, err := o.Respond(context.Background(), req, nil); err != nil {
			t.Fatalf("Respond: %v", err)
		}
		var got wireRequest
		if err := json.Unmarshal(ep.requests()[0], &got); err != nil {
			t.Fatalf("decode body: %v", err)
		}
		if len(got.Messages) != 1 || got.Messages[0].Role != "user" {
			t.Errorf("messages: got %+v, want the single user message and no system message", got.Messages)
		}
		if got.Temperature != nil || got.TopP != nil || got.Seed != nil || got.MaxTokens != nil {
			t.Errorf("got temperature %v top_p %v seed %v max_tokens %v, want all absent", got.Temperature, got.TopP, got.Seed, got.MaxTokens)
		}
	})
	t.Run("OKZeroTemperatureSent", func(t *testing.T) {
		ep := newEndpoint(t, okStep("Understood."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		req := sampleRequest()
		req.Params.Temperature = ptr(0.0)
		if _, err := o.Respond(context.Background(), req, nil); err != nil {
			t.Fatalf("Respond: %v", err)
		}
		var got wireRequest
		if err := json.Unmarshal(ep.requests()[0], &got); err != nil {
			t.Fatalf("decode body: %v", err)
		}
		if got.Temperature == nil || *got.Temperature > 1e-30 {
			t.Errorf("temperature: got %v, want present and (effectively) zero", got.Temperature)
		}
	})
	t.Run("OKMaxCompletionTokens", func(t *testing.T) {
		ep := newEndpoint(t, okStep("Understood."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		req := sampleRequest()
		req.Params = Params{Model: "o4-fictional", MaxTokens: 300}
		if _, err := o.Respond(context.Background(), req, nil); err != nil {
			t.Fatalf("Respond: %v", err)
		}
		var got wireRequest
		if err := json.Unmarshal(ep.requests()[0], &got); err != nil {
			t.Fatalf("decode body: %v", err)
		}
		if got.MaxTokens != nil || got.MaxCompletionTokens == nil || *got.MaxCompletionTokens != 300 {
			t.Errorf("got max_tokens %v max_completion_tokens %v, want absent and 300", got.MaxTokens, got.MaxCompletionTokens)
		}
	})
	t.Run("ErrBadRole", func(t *testing.T) {
		ep := newEndpoint(t, okStep("Understood."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		req := sampleRequest()
		req.Messages = append(req.Messages, Message{Role: "system", Text: "smuggled"})
		_, err := o.Respond(context.Background(), req, nil)
		if e := asError(t, err); e.Kind != KindClientError {
			t.Errorf("kind: got %q, want %q", e.Kind, KindClientError)
		}
		if n := len(ep.requests()); n != 0 {
			t.Errorf("requests: got %d, want 0", n)
		}
	})
}

// TestOpenAIFaults runs the failure cases, then checks that no goroutine
// outlives them. It does not run in parallel so the count is meaningful.
func TestOpenAIFaults(t *testing.T) {
	baseline := runtime.NumGoroutine()

	t.Run("OKRateLimitedRetryAfter", func(t *testing.T) {
		ep := newEndpoint(t, statusStep(http.StatusTooManyRequests, "1", errorBody("slow down", "rate_limit_error")), okStep("Fine."))
		o, sl := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) { c.BackoffBase = time.Millisecond })
		res, err := o.Respond(context.Background(), sampleRequest(), nil)
		if err != nil {
			t.Fatalf("Respond: %v", err)
		}
		if res.Retries != 1 {
			t.Errorf("Retries: got %d, want 1", res.Retries)
		}
		if w := sl.list(); len(w) != 1 || w[0] < time.Second {
			t.Errorf("waits: got %v, want one of at least 1s", w)
		}
		sum := sha256.Sum256(ep.requests()[1])
		if want := hex.EncodeToString(sum[:]); res.RequestSHA256 != want {
			t.Errorf("RequestSHA256: got %s, want hash of the second body %s", res.RequestSHA256, want)
		}
	})
	t.Run("OKServerErrorsTwice", func(t *testing.T) {
		ep := newEndpoint(t,
			statusStep(500, "", errorBody("internal", "server_error")),
			statusStep(500, "", errorBody("internal", "server_error")),
			okStep("Fine."))
		o, sl := newTestOpenAI(t, ep.baseURL(), nil)
		res, err := o.Respond(context.Background(), sampleRequest(), nil)
		if err != nil {
			t.Fatalf("Respond: %v", err)
		}
		if res.Retries != 2 || res.Text != "Fine." {
			t.Errorf("got retries %d text %q, want 2 and Fine.", res.Retries, res.Text)
		}
		if w := sl.list(); len(w) != 2 {
			t.Errorf("waits: got %v, want 2", w)
		}
	})
	t.Run("ErrServerErrorPersistent", func(t *testing.T) {
		ep := newEndpoint(t, statusStep(503, "", errorBody("unavailable", "server_error")))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		res, err := o.Respond(context.Background(), sampleRequest(), nil)
		e := asError(t, err)
		if e.Kind != KindServerError || e.Status != 503 || e.Attempts != 4 {
			t.Errorf("got kind %q status %d attempts %d, want server_error 503 4", e.Kind, e.Status, e.Attempts)
		}
		if res.Retries != 3 || len(ep.requests()) != 4 {
			t.Errorf("got retries %d requests %d, want 3 and 4", res.Retries, len(ep.requests()))
		}
		if !e.Retryable() {
			t.Error("Retryable: got false, want true")
		}
	})
	t.Run("ErrUnauthorizedNoRetry", func(t *testing.T) {
		// The body echoes the key, as a careless endpoint might.
		ep := newEndpoint(t, statusStep(401, "", errorBody("invalid key "+testKey, "invalid_request_error")), okStep("never"))
		o, sl := newTestOpenAI(t, ep.baseURL(), nil)
		_, err := o.Respond(context.Background(), sampleRequest(), nil)
		e := asError(t, err) // also checks the key is absent
		if e.Kind != KindClientError || e.Status != 401 || e.Attempts != 1 {
			t.Errorf("got kind %q status %d attempts %d, want client_error 401 1", e.Kind, e.Status, e.Attempts)
		}
		if n := len(ep.requests()); n != 1 || len(sl.list()) != 0 {
			t.Errorf("got %d requests and waits %v, want 1 and none", n, sl.list())
		}
		if e.Retryable() {
			t.Error("Retryable: got true, want false")
		}
	})
	t.Run("OKCutOffThenComplete", func(t *testing.T) {
		ep := newEndpoint(t,
			streamStep(streamSpec{model: "alder-chat-1", parts: []string{"The mill ", "car park"}}),
			okStep("The mill car park ", "has room."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		sink := &recordSink{}
		res, err := o.Respond(context.Background(), sampleRequest(), sink)
		if err != nil {
			t.Fatalf("Respond: %v", err)
		}
		if sink.count("reset") != 1 {
			t.Errorf("resets: got %d, want 1 (events %q)", sink.count("reset"), sink.list())
		}
		if want := "The mill car park has room."; res.Text != want || sink.text() != want {
			t.Errorf("text: got %q, sink shows %q, want %q", res.Text, sink.text(), want)
		}
		if res.Retries != 1 {
			t.Errorf("Retries: got %d, want 1", res.Retries)
		}
	})
	t.Run("ErrCutOffPersistent", func(t *testing.T) {
		ep := newEndpoint(t, streamStep(streamSpec{model: "alder-chat-1", parts: []string{"The mill "}, done: true}))
		o, _ := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) { c.MaxAttempts = 2 })
		_, err := o.Respond(context.Background(), sampleRequest(), nil)
		if e := asError(t, err); e.Kind != KindCutOff || e.Attempts != 2 {
			t.Errorf("got kind %q attempts %d, want cut_off 2", e.Kind, e.Attempts)
		}
	})
	t.Run("OKMalformedThenComplete", func(t *testing.T) {
		malformed := func(w http.ResponseWriter, r *http.Request) {
			startStream(w)
			writeEvent(w, `{"id":"chatcmpl-fict","choices":[{"index":0,"delta":{"content":"Hal`)
		}
		ep := newEndpoint(t, malformed, okStep("Whole."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		res, err := o.Respond(context.Background(), sampleRequest(), nil)
		if err != nil {
			t.Fatalf("Respond: %v", err)
		}
		if res.Retries != 1 || res.Text != "Whole." {
			t.Errorf("got retries %d text %q, want 1 and Whole.", res.Retries, res.Text)
		}
	})
	t.Run("ErrMalformedPersistent", func(t *testing.T) {
		ep := newEndpoint(t, func(w http.ResponseWriter, r *http.Request) {
			startStream(w)
			writeEvent(w, `{"choices": [`)
		})
		o, _ := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) { c.MaxAttempts = 1 })
		_, err := o.Respond(context.Background(), sampleRequest(), nil)
		if e := asError(t, err); e.Kind != KindBadStream {
			t.Errorf("kind: got %q, want bad_stream", e.Kind)
		}
	})
	t.Run("OKMidStreamErrorThenComplete", func(t *testing.T) {
		midErr := func(w http.ResponseWriter, r *http.Request) {
			startStream(w)
			writeEvent(w, chunkJSON("alder-chat-1", "", []map[string]any{{"index": 0, "delta": map[string]any{"content": "Part"}, "finish_reason": nil}}, nil))
			writeEvent(w, errorBody("the fictional model is overloaded", "server_error"))
		}
		ep := newEndpoint(t, midErr, okStep("Again."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		sink := &recordSink{}
		res, err := o.Respond(context.Background(), sampleRequest(), sink)
		if err != nil {
			t.Fatalf("Respond: %v", err)
		}
		if res.Text != "Again." || sink.count("reset") != 1 || sink.text() != "Again." {
			t.Errorf("got text %q, sink %q, want Again. after one reset", res.Text, sink.list())
		}
	})
	t.Run("OKPlainJSONThenStream", func(t *testing.T) {
		plain := statusStep(200, "", `{"id":"x","object":"chat.completion","choices":[{"index":0,"message":{"role":"assistant","content":"No stream."},"finish_reason":"stop"}]}`)
		ep := newEndpoint(t, plain, okStep("Streamed."))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil)
		res, err := o.Respond(context.Background(), sampleRequest(), nil)
		if err != nil {
			t.Fatalf("Respond: %v", err)
		}
		if res.Retries != 1 || res.Text != "Streamed." {
			t.Errorf("got retries %d text %q, want 1 and Streamed.", res.Retries, res.Text)
		}
	})
	t.Run("ErrTimeout", func(t *testing.T) {
		ep := newEndpoint(t, hangStep())
		o, _ := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) { c.Timeout = 200 * time.Millisecond; c.MaxAttempts = 2 })
		_, err := o.Respond(context.Background(), sampleRequest(), nil)
		if e := asError(t, err); e.Kind != KindTimeout || e.Attempts != 2 {
			t.Errorf("got kind %q attempts %d, want timeout 2", e.Kind, e.Attempts)
		}
	})
	t.Run("ErrTimeoutMidStream", func(t *testing.T) {
		ep := newEndpoint(t, hangStep("Begun "))
		o, _ := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) { c.Timeout = 200 * time.Millisecond; c.MaxAttempts = 1 })
		sink := &recordSink{}
		_, err := o.Respond(context.Background(), sampleRequest(), sink)
		if e := asError(t, err); e.Kind != KindTimeout {
			t.Errorf("kind: got %q, want timeout", e.Kind)
		}
		if sink.count("chunk:Begun ") != 1 {
			t.Errorf("sink: got %q, want the first chunk", sink.list())
		}
	})
	t.Run("ErrFirstByteTimeout", func(t *testing.T) {
		ep := newEndpoint(t, hangStep())
		o, _ := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) { c.FirstByteTimeout = 200 * time.Millisecond; c.MaxAttempts = 1 })
		_, err := o.Respond(context.Background(), sampleRequest(), nil)
		if e := asError(t, err); e.Kind != KindTimeout || !errors.Is(err, errFirstByteTimeout) {
			t.Errorf("got %v, want a first-byte timeout", err)
		}
	})
	t.Run("ErrConnectionRefused", func(t *testing.T) {
		ln, err := net.Listen("tcp", "127.0.0.1:0")
		if err != nil {
			t.Fatal(err)
		}
		addr := ln.Addr().String()
		ln.Close()
		o, sl := newTestOpenAI(t, "http://"+addr+"/v1", func(c *OpenAIConfig) { c.MaxAttempts = 2 })
		_, err = o.Respond(context.Background(), sampleRequest(), nil)
		if e := asError(t, err); e.Kind != KindRefused || e.Attempts != 2 {
			t.Errorf("got kind %q attempts %d, want refused 2", e.Kind, e.Attempts)
		}
		if len(sl.list()) != 1 {
			t.Errorf("waits: got %v, want 1", sl.list())
		}
	})
	t.Run("ErrCanceled", func(t *testing.T) {
		ep := newEndpoint(t, hangStep("Half "))
		o, _ := newTestOpenAI(t, ep.baseURL(), nil) // Timeout 10s: only cancellation can end this
		ctx, cancel := context.WithCancel(context.Background())
		defer cancel()
		sink := &recordSink{onChunk: cancel}
		_, err := o.Respond(ctx, sampleRequest(), sink)
		e := asError(t, err)
		if e.Kind != KindCanceled || e.Attempts != 1 || !errors.Is(err, context.Canceled) {
			t.Errorf("got %v (kind %q attempts %d), want canceled after 1 attempt", err, e.Kind, e.Attempts)
		}
		if e.Retryable() {
			t.Error("Retryable: got true, want false")
		}
	})
	t.Run("ErrCanceledDuringBackoff", func(t *testing.T) {
		ep := newEndpoint(t, statusStep(503, "", errorBody("unavailable", "server_error")))
		ctx, cancel := context.WithCancel(context.Background())
		o, _ := newTestOpenAI(t, ep.baseURL(), func(c *OpenAIConfig) {
			c.Sleep = func(context.Context, time.Duration) error { cancel(); return context.Canceled }
		})
		_, err := o.Respond(ctx, sampleRequest(), nil)
		if e := asError(t, err); e.Kind != KindCanceled || e.Attempts != 1 {
			t.Errorf("got kind %q attempts %d, want canceled 1", e.Kind, e.Attempts)
		}
	})

	// Every server above is closed by its subtest's cleanup; idle client
	// connections were closed too. Poll until the runtime catches up.
	var now int
	for range 40 {
		runtime.GC()
		if now = runtime.NumGoroutine(); now <= baseline {
			return
		}
		time.Sleep(50 * time.Millisecond)
	}
	buf := make([]byte, 1<<16)
	t.Errorf("goroutines: got %d, want at most the baseline %d\n%s", now, baseline, buf[:runtime.Stack(buf, true)])
}

func TestOpenAIConcurrent(t *testing.T) {
	ep := newEndpoint(t, okStep("Same ", "answer."))
	o, _ := newTestOpenAI(t, ep.baseURL(), nil)
	const n = 8
	errs := make(chan error, n)
	for i := range n {
		go func() {
			req := sampleRequest()
			req.Messages[1].Text = strings.Repeat("hmm ", i+1)
			res, err := o.Respond(context.Background(), req, nil)
			if err == nil {
				body, _ := RequestBody(req)
				sum := sha256.Sum256(body)
				if res.RequestSHA256 != hex.EncodeToString(sum[:]) {
					err = errors.New("RequestSHA256 is not the hash of this call's own body")
				}
			}
			errs <- err
		}()
	}
	for range n {
		if err := <-errs; err != nil {
			t.Error(err)
		}
	}
}

func TestNewOpenAIErrors(t *testing.T) {
	for name, cfg := range map[string]OpenAIConfig{
		"ErrNoBaseURL":   {},
		"ErrNotHTTP":     {BaseURL: "ftp://models.example.org/v1"},
		"ErrNegativeTry": {BaseURL: "http://127.0.0.1/v1", MaxAttempts: -1},
	} {
		t.Run(name, func(t *testing.T) {
			cfg.APIKey = testKey
			_, err := NewOpenAI(cfg)
			if err == nil {
				t.Fatal("got nil error, want one")
			}
			if strings.Contains(err.Error(), testKey) {
				t.Errorf("error contains the key: %v", err)
			}
		})
	}
}

func TestParseRetryAfter(t *testing.T) {
	now := time.Date(2027, 3, 1, 12, 0, 0, 0, time.UTC)
	for _, tc := range []struct {
		in   string
		want time.Duration
	}{
		{"", 0},
		{"1", time.Second},
		{" 7 ", 7 * time.Second},
		{"0", 0},
		{"-3", 0},
		{"3600", 30 * time.Second},
		{"99999999999999999", 30 * time.Second},
		{"Mon, 01 Mar 2027 12:00:05 GMT", 5 * time.Second},
		{"Mon, 01 Mar 2027 11:00:00 GMT", 0},
		{"Mon, 01 Mar 2027 13:00:00 GMT", 30 * time.Second},
		{"soon", 0},
	} {
		if got := parseRetryAfter(tc.in, now, 30*time.Second); got != tc.want {
			t.Errorf("parseRetryAfter(%q): got %v, want %v", tc.in, got, tc.want)
		}
	}
}

func TestBackoff(t *testing.T) {
	o, err := NewOpenAI(OpenAIConfig{
		BaseURL: "http://127.0.0.1/v1",
		Jitter:  func(c time.Duration) time.Duration { return c }, // the ceiling itself
	})
	if err != nil {
		t.Fatal(err)
	}
	want := []time.Duration{500 * time.Millisecond, time.Second, 2 * time.Second, 4 * time.Second, 8 * time.Second, 8 * time.Second}
	for i, w := range want {
		if got := o.backoff(i+1, 0); got != w {
			t.Errorf("backoff(%d): got %v, want %v", i+1, got, w)
		}
	}
	if got := o.backoff(1, 3*time.Second); got != 3*time.Second {
		t.Errorf("backoff with Retry-After 3s: got %v, want 3s", got)
	}
	for range 100 {
		if d := fullJitter(time.Second); d < 0 || d > time.Second {
			t.Fatalf("fullJitter(1s): got %v, want within [0, 1s]", d)
		}
	}
}
