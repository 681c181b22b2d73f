package server

import (
	"bufio"
	"encoding/json"
	"fmt"
	"net/http"
	"net/http/httptest"
	"strings"
	"sync"
	"testing"
)

// TestAppendJSONString checks the hand-written string encoder of chunk
// events byte for byte against encoding/json's Marshal, the reference it
// replaces.
func TestAppendJSONString(t *testing.T) {
	cases := []string{
		"", "plain words", `quote " and \ backslash`, "line\nbreak\r\ttab\b\f",
		"\x00\x01\x1f\x7f", "<script>&amp;</script>", "Ümlaut, ünïcödé, 中文, عربي",
		"\u2028\u2029", "emoji 🙂 and 👩‍👩‍👧", "bad \xff utf-8 \xc3", "\xed\xa0\x80 surrogate half",
		strings.Repeat("long text ", 500),
	}
	for b := range 256 {
		cases = append(cases, string([]byte{byte(b)}), "a"+string([]byte{byte(b)})+"z")
	}
	for _, s := range cases {
		want, err := json.Marshal(s)
		if err != nil {
			t.Fatal(err)
		}
		if got := appendJSONString(nil, s); string(got) != string(want) {
			t.Errorf("appendJSONString(%q): got %s, want %s as json.Marshal writes it", s, got, want)
		}
	}
}

// FuzzAppendJSONString holds the encoder to json.Marshal on any text.
func FuzzAppendJSONString(f *testing.F) {
	f.Add("plain")
	f.Add("<&>\u2028\xff\n")
	f.Fuzz(func(t *testing.T, s string) {
		want, _ := json.Marshal(s)
		if got := appendJSONString(nil, s); string(got) != string(want) {
			t.Fatalf("appendJSONString(%q): got %s, want %s", s, got, want)
		}
	})
}

// sseEvent is one event as a client parses it.
type sseEvent struct {
	name string
	data string
}

// readSSE reads a stream of events to its end, the way the page does
// (web/static/chat.js readEvents): blocks end with a blank line, an
// "event:" line names the event and "data:" lines carry its data.
func readSSE(t *testing.T, res *http.Response) []sseEvent {
	t.Helper()
	var out []sseEvent
	var cur sseEvent
	sc := bufio.NewScanner(res.Body)
	for sc.Scan() {
		line := sc.Text()
		switch {
		case line == "":
			out = append(out, cur)
			cur = sseEvent{}
		case strings.HasPrefix(line, "event: "):
			cur.name = strings.TrimPrefix(line, "event: ")
		case strings.HasPrefix(line, "data: "):
			cur.data += strings.TrimPrefix(line, "data: ")
		default:
			t.Fatalf("unexpected line %q in the stream", line)
		}
	}
	if err := sc.Err(); err != nil {
		t.Fatal(err)
	}
	return out
}

// countingWriter counts the writes that reach the connection's side.
type countingWriter struct {
	http.ResponseWriter
	mu     sync.Mutex
	writes int
}

func (c *countingWriter) Write(p []byte) (int, error) {
	c.mu.Lock()
	c.writes++
	c.mu.Unlock()
	return c.ResponseWriter.Write(p)
}

func (c *countingWriter) Unwrap() http.ResponseWriter { return c.ResponseWriter }

// TestEventWriterStream streams a reply through the event writer over real
// HTTP: however the chunks are grouped into writes, the client reads every
// chunk as its own event, in order, whole, with the control events around
// them where they were sent.
func TestEventWriterStream(t *testing.T) {
	pieces := []string{"The ferry ", "leaves at ", "seven <every> ", "morning & ", "\"from\" the\nold ", "pier. 🙂"}
	for _, c := range []struct {
		name   string
		chunks int // chunks sent back to back, cycling through pieces
	}{
		{"OKFewChunks", 3},
		{"OKManyChunksBackToBack", 400},
	} {
		t.Run(c.name, func(t *testing.T) {
			var writes int
			srv := httptest.NewServer(http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
				cw := &countingWriter{ResponseWriter: w}
				ev := newEventWriter(cw)
				defer ev.close()
				ev.event("saved", map[string]int{"turns": 1})
				for i := range c.chunks {
					ev.Chunk(pieces[i%len(pieces)])
					if i == c.chunks/2 {
						ev.Reset()
					}
				}
				ev.event("done", map[string]string{"reply": "end"})
				cw.mu.Lock()
				writes = cw.writes
				cw.mu.Unlock()
			}))
			defer srv.Close()
			req, _ := http.NewRequest("POST", srv.URL, nil)
			req.Header.Set("Accept", "text/event-stream")
			res, err := srv.Client().Do(req)
			if err != nil {
				t.Fatal(err)
			}
			defer res.Body.Close()
			if ct := res.Header.Get("Content-Type"); ct != "text/event-stream; charset=utf-8" {
				t.Fatalf("Content-Type: got %q", ct)
			}
			events := readSSE(t, res)
			var names []string
			var text strings.Builder
			for _, e := range events {
				names = append(names, e.name)
				if e.name == "chunk" {
					var d struct{ Text string }
					if err := json.Unmarshal([]byte(e.data), &d); err != nil {
						t.Fatalf("chunk data %q: %v", e.data, err)
					}
					text.WriteString(d.Text)
				}
			}
			var want strings.Builder
			wantNames := []string{"saved"}
			for i := range c.chunks {
				want.WriteString(pieces[i%len(pieces)])
				wantNames = append(wantNames, "chunk")
				if i == c.chunks/2 {
					wantNames = append(wantNames, "reset")
				}
			}
			wantNames = append(wantNames, "done")
			if got := strings.Join(names, ","); got != strings.Join(wantNames, ",") {
				t.Fatalf("events: got %s, want %s", got, strings.Join(wantNames, ","))
			}
			if text.String() != want.String() {
				t.Fatalf("streamed text: got %q, want %q", text.String(), want.String())
			}
			// at most one write per event; fewer when chunks were coalesced
			if writes > len(wantNames) {
				t.Fatalf("writes: got %d, want at most %d (one per event)", writes, len(wantNames))
			}
			t.Logf("%d events in %d writes", len(wantNames), writes)
		})
	}
}

// BenchmarkEventWriterChunk is the cost of one streamed chunk through the
// event writer, coalesced or not, to an in-memory response.
func BenchmarkEventWriterChunk(b *testing.B) {
	w := httptest.NewRecorder()
	ev := newEventWriter(w)
	defer ev.close()
	var pieces [8]string
	for i := range pieces {
		pieces[i] = fmt.Sprintf("piece <%d> ", i)
	}
	b.ReportAllocs()
	for i := 0; b.Loop(); i++ {
		ev.Chunk(pieces[i&7])
		if i%64 == 63 {
			ev.event("saved", struct{}{})
			w.Body.Reset()
		}
	}
}
