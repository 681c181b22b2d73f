package server

import (
	"encoding/json"
	"fmt"
	"net/http"
)

// eventWriter writes Server-Sent Events (the WHATWG HTML "server-sent
// events" format: "event:" and "data:" lines, a blank line after each) and
// flushes each one. It is the model responder's Sink while a reply streams.
type eventWriter struct {
	w   http.ResponseWriter
	rc  *http.ResponseController
	err error // the first write error: the respondent left; generation goes on
}

func newEventWriter(w http.ResponseWriter) *eventWriter {
	h := w.Header()
	h.Set("Content-Type", "text/event-stream; charset=utf-8")
	h.Set("Cache-Control", "no-store")
	h.Set("X-Accel-Buffering", "no") // ask reverse proxies not to buffer the stream
	w.WriteHeader(http.StatusOK)
	ev := &eventWriter{w: w, rc: http.NewResponseController(w)}
	if err := ev.rc.Flush(); err != nil {
		ev.err = err
	}
	return ev
}

func (e *eventWriter) event(name string, v any) {
	if e.err != nil {
		return
	}
	b, err := json.Marshal(v)
	if err != nil {
		e.err = err
		return
	}
	if _, err := fmt.Fprintf(e.w, "event: %s\ndata: %s\n\n", name, b); err != nil {
		e.err = err
		return
	}
	e.err = e.rc.Flush()
}

// Chunk sends a piece of the reply as it arrives.
func (e *eventWriter) Chunk(text string) { e.event("chunk", map[string]string{"text": text}) }

// Reset tells the page that the reply starts over after a failed attempt.
func (e *eventWriter) Reset() { e.event("reset", struct{}{}) }
