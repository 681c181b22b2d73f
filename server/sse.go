package server

import (
	"encoding/json"
	"net/http"
	"sync"
	"time"
	"unicode/utf8"
)

// coalesceWindow bounds how long a chunk of a streaming reply may wait
// before it is written. A chunk that arrives when the stream was last
// written at least this long ago goes out at once; chunks that arrive
// sooner wait together and leave in one write when the window ends. A model
// that sends one piece every 50 ms or slower is streamed piece by piece; a
// faster one costs at most 20 writes a second per stream instead of one per
// token.
const coalesceWindow = 50 * time.Millisecond

// eventWriter writes Server-Sent Events (the WHATWG HTML "server-sent
// events" format: "event:" and "data:" lines, a blank line after each). It
// is the model responder's Sink while a reply streams. Chunks are coalesced
// within coalesceWindow; every other event (saved, reset, done, error) is
// written at once, after any chunks still waiting, so events keep their
// order. Each event keeps its own event/data lines: a coalesced write holds
// several whole events, never a merged one.
type eventWriter struct {
	w  http.ResponseWriter
	rc *http.ResponseController

	mu      sync.Mutex
	pending []byte      // encoded events not yet written
	last    time.Time   // when the stream was last written
	timer   *time.Timer // writes pending chunks when the window ends; nil until first needed
	armed   bool        // the timer is set
	closed  bool        // the handler is done: nothing more may be written
	err     error       // the first write error: the respondent left; generation goes on
}

func newEventWriter(w http.ResponseWriter) *eventWriter {
	h := w.Header()
	h.Set("Content-Type", "text/event-stream; charset=utf-8")
	h.Set("Cache-Control", "no-store")
	h.Set("X-Accel-Buffering", "no") // ask reverse proxies not to buffer the stream
	w.WriteHeader(http.StatusOK)
	ev := &eventWriter{w: w, rc: http.NewResponseController(w), pending: make([]byte, 0, 512)}
	if err := ev.rc.Flush(); err != nil {
		ev.err = err
	}
	ev.last = time.Now()
	return ev
}

// event writes a control event with v as its JSON data, after any pending
// chunks, and flushes.
func (e *eventWriter) event(name string, v any) {
	b, err := json.Marshal(v)
	e.mu.Lock()
	defer e.mu.Unlock()
	if e.err != nil || e.closed {
		return
	}
	if err != nil {
		e.err = err
		return
	}
	e.pending = appendEvent(e.pending, name, b)
	e.flushLocked()
}

// Chunk sends a piece of the reply as it arrives, coalesced with the
// pieces that follow it within coalesceWindow.
func (e *eventWriter) Chunk(text string) {
	e.mu.Lock()
	defer e.mu.Unlock()
	if e.err != nil || e.closed {
		return
	}
	e.pending = appendChunk(e.pending, text)
	if e.armed {
		return // the timer writes it with the others
	}
	wait := coalesceWindow - time.Since(e.last)
	if wait <= 0 {
		e.flushLocked()
		return
	}
	e.armed = true
	if e.timer == nil {
		e.timer = time.AfterFunc(wait, e.flushTimer)
	} else {
		e.timer.Reset(wait)
	}
}

// Reset tells the page that the reply starts over after a failed attempt.
func (e *eventWriter) Reset() { e.event("reset", struct{}{}) }

// close ends the stream's writing when its handler returns: the response
// may not be written after that, so a waiting timer must not fire into it.
// Pending chunks are dropped only if no final event was written, which
// happens only when the handler gives up on the stream.
func (e *eventWriter) close() {
	e.mu.Lock()
	defer e.mu.Unlock()
	e.closed = true
	if e.timer != nil {
		e.timer.Stop()
	}
	e.armed = false
}

func (e *eventWriter) flushTimer() {
	e.mu.Lock()
	defer e.mu.Unlock()
	e.armed = false
	if e.err != nil || e.closed || len(e.pending) == 0 {
		return
	}
	e.flushLocked()
}

// flushLocked writes what is pending in one write and flushes it to the
// connection. The caller holds e.mu.
func (e *eventWriter) flushLocked() {
	if e.armed {
		e.timer.Stop()
		e.armed = false
	}
	if len(e.pending) == 0 {
		return
	}
	_, err := e.w.Write(e.pending)
	if err == nil {
		err = e.rc.Flush()
	}
	e.err = err
	e.last = time.Now()
	if cap(e.pending) > 64<<10 {
		e.pending = make([]byte, 0, 512) // a long reply's buffer is not kept
	} else {
		e.pending = e.pending[:0]
	}
}

// appendEvent appends one event whose data is a single line of JSON.
func appendEvent(dst []byte, name string, data []byte) []byte {
	dst = append(dst, "event: "...)
	dst = append(dst, name...)
	dst = append(dst, "\ndata: "...)
	dst = append(dst, data...)
	return append(dst, "\n\n"...)
}

// appendChunk appends the chunk event {"text": text} without reflection.
func appendChunk(dst []byte, text string) []byte {
	dst = append(dst, "event: chunk\ndata: {\"text\":"...)
	dst = appendJSONString(dst, text)
	return append(dst, "}\n\n"...)
}

const hexDigits = "0123456789abcdef"

// appendJSONString appends s as a JSON string (RFC 8259 section 7), escaped
// byte for byte as encoding/json's Marshal escapes strings (its documented
// behaviour: <, > and & as \u003c, \u003e, \u0026; U+2028 and U+2029
// escaped; invalid UTF-8 replaced by U+FFFD), so that a chunk reads the same
// as it did when it was marshalled. TestAppendJSONString checks it against
// json.Marshal.
func appendJSONString(dst []byte, s string) []byte {
	dst = append(dst, '"')
	start := 0
	for i := 0; i < len(s); {
		if b := s[i]; b < utf8.RuneSelf {
			if b >= 0x20 && b != '"' && b != '\\' && b != '<' && b != '>' && b != '&' {
				i++
				continue
			}
			dst = append(dst, s[start:i]...)
			switch b {
			case '"', '\\':
				dst = append(dst, '\\', b)
			case '\b':
				dst = append(dst, '\\', 'b')
			case '\f':
				dst = append(dst, '\\', 'f')
			case '\n':
				dst = append(dst, '\\', 'n')
			case '\r':
				dst = append(dst, '\\', 'r')
			case '\t':
				dst = append(dst, '\\', 't')
			default:
				dst = append(dst, '\\', 'u', '0', '0', hexDigits[b>>4], hexDigits[b&0xF])
			}
			i++
			start = i
			continue
		}
		r, size := utf8.DecodeRuneInString(s[i:])
		if r == utf8.RuneError && size == 1 {
			dst = append(dst, s[start:i]...)
			dst = append(dst, `\ufffd`...)
			i += size
			start = i
			continue
		}
		if r == '\u2028' || r == '\u2029' {
			dst = append(dst, s[start:i]...)
			dst = append(dst, '\\', 'u', '2', '0', '2', hexDigits[r&0xF])
			i += size
			start = i
			continue
		}
		i += size
	}
	dst = append(dst, s[start:]...)
	return append(dst, '"')
}
