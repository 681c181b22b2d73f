package responder

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"syscall"
	"time"

	openai "github.com/sashabaranov/go-openai"
)

// Defaults of OpenAIConfig.
const (
	DefaultTimeout       = 60 * time.Second
	DefaultMaxAttempts   = 4
	DefaultBackoffBase   = 500 * time.Millisecond
	DefaultBackoffMax    = 8 * time.Second
	DefaultRetryAfterMax = 30 * time.Second
)

// OpenAIConfig says where and how to reach an OpenAI-compatible
// chat-completions endpoint.
type OpenAIConfig struct {
	BaseURL string // ends in /v1; the client appends /chat/completions
	APIKey  string // secret: never in errors or logs; empty sends no Authorization header

	Timeout          time.Duration // per attempt, whole stream included (default DefaultTimeout)
	FirstByteTimeout time.Duration // per attempt, from sending to the first stream event (0 = Timeout alone applies)
	MaxAttempts      int           // attempts per call, the first included (default DefaultMaxAttempts)
	BackoffBase      time.Duration // ceiling of the first backoff (default DefaultBackoffBase)
	BackoffMax       time.Duration // largest backoff ceiling (default DefaultBackoffMax)
	RetryAfterMax    time.Duration // longest Retry-After honoured (default DefaultRetryAfterMax)

	HTTPClient *http.Client // optional; copied, and its Transport wrapped to record each request

	// Sleep waits d or until ctx ends; tests replace it to avoid waiting.
	// Default: a timer that honours ctx.
	Sleep func(ctx context.Context, d time.Duration) error
	// Jitter draws a backoff in [0, ceiling]; tests may fix it.
	// Default: uniform (full jitter).
	Jitter func(ceiling time.Duration) time.Duration
}

// OpenAI is a Responder backed by an OpenAI-compatible endpoint. It is safe
// for concurrent use.
type OpenAI struct {
	cfg    OpenAIConfig
	http   *http.Client
	client *openai.Client
}

// NewOpenAI checks cfg, fills its defaults and builds the client.
func NewOpenAI(cfg OpenAIConfig) (*OpenAI, error) {
	u, err := url.Parse(cfg.BaseURL)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return nil, fmt.Errorf("openai endpoint: base URL %q is not an http(s) URL", cfg.BaseURL)
	}
	if cfg.Timeout < 0 || cfg.FirstByteTimeout < 0 || cfg.MaxAttempts < 0 ||
		cfg.BackoffBase < 0 || cfg.BackoffMax < 0 || cfg.RetryAfterMax < 0 {
		return nil, errors.New("openai endpoint: timeouts, attempts and backoffs must not be negative")
	}
	if cfg.Timeout == 0 {
		cfg.Timeout = DefaultTimeout
	}
	if cfg.MaxAttempts == 0 {
		cfg.MaxAttempts = DefaultMaxAttempts
	}
	if cfg.BackoffBase == 0 {
		cfg.BackoffBase = DefaultBackoffBase
	}
	if cfg.BackoffMax == 0 {
		cfg.BackoffMax = DefaultBackoffMax
	}
	if cfg.RetryAfterMax == 0 {
		cfg.RetryAfterMax = DefaultRetryAfterMax
	}
	if cfg.Sleep == nil {
		cfg.Sleep = sleepCtx
	}
	if cfg.Jitter == nil {
		cfg.Jitter = fullJitter
	}

	var hc http.Client
	if cfg.HTTPClient != nil {
		hc = *cfg.HTTPClient
	}
	base := hc.Transport
	if base == nil {
		base = http.DefaultTransport.(*http.Transport).Clone()
	}
	hc.Transport = &captureTransport{base: base}
	cfg.HTTPClient = &hc

	oc := openai.DefaultConfig(cfg.APIKey)
	oc.BaseURL = strings.TrimRight(cfg.BaseURL, "/")
	oc.HTTPClient = &hc
	return &OpenAI{cfg: cfg, http: &hc, client: openai.NewClientWithConfig(oc)}, nil
}

// CloseIdleConnections closes kept-alive connections to the endpoint, for
// shutdown and for tests that count goroutines.
func (o *OpenAI) CloseIdleConnections() { o.http.CloseIdleConnections() }

// failure is one failed attempt.
type failure struct {
	kind       string
	status     int
	retryAfter time.Duration
	err        error
}

// reply is what one successful attempt produced.
type reply struct {
	text         strings.Builder
	model        string
	fingerprint  string
	finish       string
	promptTokens int
	complTokens  int
	bodySHA      string
}

var (
	errAttemptTimeout   = errors.New("attempt exceeded its time limit")
	errFirstByteTimeout = errors.New("no stream event before the first-byte time limit")
	errNoFinish         = errors.New("stream ended before a finish reason")
)

// Respond streams the model's reply into sink (nil is allowed), retrying
// failed attempts with backoff. On failure it returns an *Error, together
// with a Result holding ModelRequested, Retries and ModelTime.
func (o *OpenAI) Respond(ctx context.Context, req Request, sink Sink) (Result, error) {
	start := time.Now()
	sink = sinkOrDiscard(sink)
	res := Result{ModelRequested: req.Params.Model}
	fail := func(f failure, attempts int) (Result, error) {
		res.ModelTime = time.Since(start)
		if attempts > 0 {
			res.Retries = attempts - 1
		}
		return res, &Error{Kind: f.kind, Status: f.status, Attempts: attempts, Err: o.redact(f.err)}
	}
	if req.Params.Model == "" {
		return fail(failure{kind: KindClientError, err: errors.New("build request: no model named")}, 0)
	}
	creq, err := ChatRequest(req)
	if err != nil {
		return fail(failure{kind: KindClientError, err: err}, 0)
	}

	for attempt := 1; ; attempt++ {
		if err := ctx.Err(); err != nil {
			return fail(failure{kind: KindCanceled, err: err}, attempt-1)
		}
		r, sent, f := o.attempt(ctx, creq, sink)
		if f == nil {
			res.Text = r.text.String()
			res.ModelReported = r.model
			res.Fingerprint = r.fingerprint
			res.PromptTokens = r.promptTokens
			res.CompletionTokens = r.complTokens
			res.FinishReason = r.finish
			res.RequestSHA256 = r.bodySHA
			res.Retries = attempt - 1
			res.ModelTime = time.Since(start)
			return res, nil
		}
		if f.kind == KindCanceled || f.kind == KindClientError || attempt >= o.cfg.MaxAttempts {
			return fail(*f, attempt)
		}
		if sent {
			sink.Reset()
		}
		if err := o.cfg.Sleep(ctx, o.backoff(attempt, f.retryAfter)); err != nil {
			return fail(failure{kind: KindCanceled, err: fmt.Errorf("wait before retry: %w", err)}, attempt)
		}
	}
}

// attempt makes one streamed call. sent reports whether any chunk reached
// the sink, so that the caller knows to reset it before retrying.
func (o *OpenAI) attempt(ctx context.Context, creq openai.ChatCompletionRequest, sink Sink) (r *reply, sent bool, f *failure) {
	c := &capture{}
	actx, cancel := context.WithCancelCause(withCapture(ctx, c))
	defer cancel(nil)
	whole := time.AfterFunc(o.cfg.Timeout, func() { cancel(errAttemptTimeout) })
	defer whole.Stop()
	var first *time.Timer
	if o.cfg.FirstByteTimeout > 0 {
		first = time.AfterFunc(o.cfg.FirstByteTimeout, func() { cancel(errFirstByteTimeout) })
		defer first.Stop()
	}

	stream, err := o.client.CreateChatCompletionStream(actx, creq)
	if err != nil {
		return nil, false, o.classify(ctx, actx, c, fmt.Errorf("open stream: %w", err), false)
	}
	defer stream.Close()

	r = &reply{}
	for {
		chunk, err := stream.Recv()
		if first != nil {
			first.Stop()
		}
		if err != nil {
			if r.finish != "" && ctx.Err() == nil {
				// The reply is complete; a missing usage chunk or [DONE]
				// does not make it less so.
				break
			}
			if errors.Is(err, io.EOF) {
				return nil, sent, &failure{kind: KindCutOff, status: c.status, err: errNoFinish}
			}
			return nil, sent, o.classify(ctx, actx, c, fmt.Errorf("read stream: %w", err), true)
		}
		if chunk.Model != "" {
			r.model = chunk.Model
		}
		if chunk.SystemFingerprint != "" {
			r.fingerprint = chunk.SystemFingerprint
		}
		if chunk.Usage != nil {
			r.promptTokens = chunk.Usage.PromptTokens
			r.complTokens = chunk.Usage.CompletionTokens
		}
		// The usage chunk has no choices; only the first choice is ours
		// (Trialogue never asks for n > 1).
		for _, ch := range chunk.Choices {
			if ch.Index != 0 {
				continue
			}
			text := ch.Delta.Content + ch.Delta.Refusal
			if text != "" {
				r.text.WriteString(text)
				sink.Chunk(text)
				sent = true
			}
			if ch.FinishReason != "" && ch.FinishReason != openai.FinishReasonNull {
				r.finish = string(ch.FinishReason)
			}
		}
	}
	r.bodySHA = c.bodySHA
	return r, sent, nil
}

// classify names the kind of a failed attempt. streaming says whether the
// answer had started, which turns connection errors into cut-offs.
func (o *OpenAI) classify(ctx, actx context.Context, c *capture, err error, streaming bool) *failure {
	f := &failure{status: c.status, err: err}
	switch cause := context.Cause(actx); {
	case ctx.Err() != nil:
		f.kind = KindCanceled
		f.err = fmt.Errorf("%w (%v)", ctx.Err(), err)
		return f
	case errors.Is(cause, errAttemptTimeout) || errors.Is(cause, errFirstByteTimeout):
		f.kind = KindTimeout
		if !errors.Is(err, cause) {
			f.err = fmt.Errorf("%w: %v", cause, err)
		}
		return f
	}

	status := 0
	var apiErr *openai.APIError
	var reqErr *openai.RequestError
	switch {
	case errors.As(err, &apiErr):
		status = apiErr.HTTPStatusCode
	case errors.As(err, &reqErr):
		status = reqErr.HTTPStatusCode
	}
	if status != 0 {
		f.status = status
		f.retryAfter = parseRetryAfter(c.retryAfter, time.Now(), o.cfg.RetryAfterMax)
		switch {
		case status == http.StatusTooManyRequests:
			f.kind = KindRateLimited
		case status >= 500:
			f.kind = KindServerError
		case status == http.StatusRequestTimeout:
			f.kind = KindTimeout
		default:
			f.kind = KindClientError
		}
		return f
	}
	if apiErr != nil {
		// An error object inside a stream that had started with 200.
		f.kind = KindServerError
		return f
	}

	var urlErr *url.Error
	var netErr net.Error
	switch {
	case errors.As(err, &netErr) && netErr.Timeout():
		f.kind = KindTimeout
	case streaming && (errors.Is(err, io.ErrUnexpectedEOF) || errors.Is(err, syscall.ECONNRESET) || errors.As(err, &netErr)):
		f.kind = KindCutOff
	case streaming:
		f.kind = KindBadStream
	case errors.As(err, &urlErr):
		f.kind = KindRefused
	default:
		// go-openai refused the request before sending it (model and
		// parameter checks): no attempt will do better.
		f.kind = KindClientError
	}
	return f
}

// backoff is the wait after failed attempt n (1-based): full jitter under an
// exponential ceiling, but never less than the endpoint's Retry-After.
func (o *OpenAI) backoff(n int, retryAfter time.Duration) time.Duration {
	ceiling := o.cfg.BackoffBase
	for i := 1; i < n && ceiling < o.cfg.BackoffMax; i++ {
		ceiling *= 2
	}
	ceiling = min(ceiling, o.cfg.BackoffMax)
	return max(o.cfg.Jitter(ceiling), retryAfter)
}

// redact keeps the API key out of any error text, in case an endpoint or a
// library echoes it.
func (o *OpenAI) redact(err error) error {
	if err == nil || o.cfg.APIKey == "" || !strings.Contains(err.Error(), o.cfg.APIKey) {
		return err
	}
	return &redacted{msg: strings.ReplaceAll(err.Error(), o.cfg.APIKey, "[redacted]"), err: err}
}

type redacted struct {
	msg string
	err error
}

func (r *redacted) Error() string { return r.msg }
func (r *redacted) Unwrap() error { return r.err }

// parseRetryAfter reads a Retry-After value, delay-seconds or HTTP-date
// (RFC 9110, section 10.2.3), capped at limit; 0 if absent or unreadable.
func parseRetryAfter(v string, now time.Time, limit time.Duration) time.Duration {
	v = strings.TrimSpace(v)
	if v == "" {
		return 0
	}
	var d time.Duration
	if secs, err := strconv.ParseInt(v, 10, 64); err == nil {
		if secs <= 0 {
			return 0
		}
		if secs > int64(limit/time.Second)+1 {
			return limit
		}
		d = time.Duration(secs) * time.Second
	} else if t, err := http.ParseTime(v); err == nil {
		d = t.Sub(now)
	} else {
		return 0
	}
	return min(max(d, 0), limit)
}

func fullJitter(ceiling time.Duration) time.Duration {
	if ceiling <= 0 {
		return 0
	}
	return time.Duration(rand.Int64N(int64(ceiling) + 1))
}

func sleepCtx(ctx context.Context, d time.Duration) error {
	if d <= 0 {
		return ctx.Err()
	}
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-t.C:
		return nil
	case <-ctx.Done():
		return ctx.Err()
	}
}
