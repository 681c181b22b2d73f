package responder

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"net/http"
)

// captureKey carries a *capture in the context of one attempt, so that
// concurrent calls through the same HTTP client never mix their records.
type captureKey struct{}

// capture is what the transport saw of one attempt. It is written by
// RoundTrip, which http.Client runs on the caller's goroutine before Do
// returns, so the attempt reads it without locking.
type capture struct {
	bodySHA    string // hex SHA-256 of the request body as sent
	status     int    // HTTP status of the response, 0 if none arrived
	retryAfter string // the response's Retry-After header, verbatim
}

func withCapture(ctx context.Context, c *capture) context.Context {
	return context.WithValue(ctx, captureKey{}, c)
}

// captureTransport records, for requests whose context carries a capture,
// the hash of the body sent and the status and Retry-After of the answer.
// go-openai turns error answers into *APIError values that drop the headers,
// so this is the only place Retry-After can be read.
type captureTransport struct {
	base http.RoundTripper
}

// RoundTrip hashes the body, sends the request and records the answer.
func (t *captureTransport) RoundTrip(r *http.Request) (*http.Response, error) {
	c, _ := r.Context().Value(captureKey{}).(*capture)
	if c == nil {
		return t.base.RoundTrip(r)
	}
	if r.Body != nil && r.Body != http.NoBody {
		var body []byte
		var err error
		if r.GetBody != nil {
			body, err = readCopy(r.GetBody)
		} else {
			body, err = io.ReadAll(r.Body)
			r.Body.Close()
			if err == nil {
				r = r.Clone(r.Context())
				r.Body = io.NopCloser(bytes.NewReader(body))
				r.GetBody = func() (io.ReadCloser, error) { return io.NopCloser(bytes.NewReader(body)), nil }
			}
		}
		if err != nil {
			if r.Body != nil {
				r.Body.Close()
			}
			return nil, fmt.Errorf("read request body for hashing: %w", err)
		}
		c.bodySHA = sha256Hex(body)
	} else {
		c.bodySHA = sha256Hex(nil)
	}
	resp, err := t.base.RoundTrip(r)
	if resp != nil {
		c.status = resp.StatusCode
		c.retryAfter = resp.Header.Get("Retry-After")
	}
	return resp, err
}

// CloseIdleConnections forwards to the wrapped transport.
func (t *captureTransport) CloseIdleConnections() {
	if ci, ok := t.base.(interface{ CloseIdleConnections() }); ok {
		ci.CloseIdleConnections()
	}
}

func readCopy(get func() (io.ReadCloser, error)) ([]byte, error) {
	rc, err := get()
	if err != nil {
		return nil, err
	}
	defer rc.Close()
	return io.ReadAll(rc)
}
