package server

import (
	"bytes"
	"compress/gzip"
	"net/http"
	"strconv"
	"strings"
	"sync"
)

// maxCompressors bounds how many pages are gzipped at once. A gzip writer
// holds about 800 KB; a thousand respondents opening their pages at the same
// instant would otherwise hold a thousand. A page that finds no free
// compressor is sent as it is: correct, only a little larger.
const maxCompressors = 8

var (
	compressorSlots = make(chan struct{}, maxCompressors)
	gzipWriters     = sync.Pool{New: func() any { w, _ := gzip.NewWriterLevel(nil, gzip.DefaultCompression); return w }}
)

// compress sends pages gzipped to clients that accept it (RFC 9110 section
// 8.4, Content-Encoding). Static files come gzipped from web's own
// precompressed copies; the JSON API and the reply streams stay
// uncompressed (their answers are small, and events must leave at once).
func compress(next http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if r.Method != http.MethodGet || !isPage(r.URL.Path) || !acceptsGzip(r) {
			next.ServeHTTP(w, r)
			return
		}
		bw := &bufferedWriter{header: http.Header{}, status: http.StatusOK}
		next.ServeHTTP(bw, r)
		h := w.Header()
		for k, v := range bw.header {
			h[k] = v
		}
		h.Add("Vary", "Accept-Encoding")
		body := bw.body.Bytes()
		if len(body) >= 512 && h.Get("Content-Encoding") == "" && strings.HasPrefix(h.Get("Content-Type"), "text/html") {
			select {
			case compressorSlots <- struct{}{}:
				var out bytes.Buffer
				gz := gzipWriters.Get().(*gzip.Writer)
				gz.Reset(&out)
				_, werr := gz.Write(body)
				cerr := gz.Close()
				gzipWriters.Put(gz)
				<-compressorSlots
				if werr == nil && cerr == nil {
					h.Set("Content-Encoding", "gzip")
					body = out.Bytes()
				}
			default:
			}
		}
		h.Set("Content-Length", strconv.Itoa(len(body)))
		w.WriteHeader(bw.status)
		w.Write(body)
	})
}

// isPage reports whether a path is an HTML page: not a static file (those
// are precompressed), not the respondent API, not an entry link (a redirect).
func isPage(path string) bool {
	if rest, ok := strings.CutPrefix(path, "/c/"); ok {
		return !strings.Contains(strings.TrimSuffix(rest, "/"), "/")
	}
	return !strings.HasPrefix(path, "/static/") && !strings.HasPrefix(path, "/s/") && path != "/metrics"
}

func acceptsGzip(r *http.Request) bool {
	for _, part := range strings.Split(r.Header.Get("Accept-Encoding"), ",") {
		name, q, _ := strings.Cut(strings.TrimSpace(part), ";")
		if strings.EqualFold(strings.TrimSpace(name), "gzip") && strings.ReplaceAll(strings.TrimSpace(q), " ", "") != "q=0" {
			return true
		}
	}
	return false
}

// bufferedWriter holds a page until it is complete.
type bufferedWriter struct {
	header http.Header
	status int
	body   bytes.Buffer
}

func (b *bufferedWriter) Header() http.Header         { return b.header }
func (b *bufferedWriter) WriteHeader(status int)      { b.status = status }
func (b *bufferedWriter) Write(p []byte) (int, error) { return b.body.Write(p) }
