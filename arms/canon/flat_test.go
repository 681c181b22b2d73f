package canon

import (
	"bytes"
	"math/rand/v2"
	"strings"
	"testing"
)

// TestAppendFlatMatchesMarshal: on every shape it takes, AppendFlat writes
// exactly what Marshal writes (Marshal is checked against RFC 8785's
// vectors in canon_test.go), and it declines the shapes it does not take.
func TestAppendFlatMatchesMarshal(t *testing.T) {
	r := rand.New(rand.NewPCG(8785, 1))
	alphabet := []string{"a", "Z", "0", " ", "\"", "\\", "/", "\n", "\t", "\x00", "\x1f", "\x7f", "é", "€", "𝄞", "\u2028", "<", ">", "&"}
	str := func() string {
		var b strings.Builder
		for range r.IntN(12) {
			b.WriteString(alphabet[r.IntN(len(alphabet))])
		}
		return b.String()
	}
	key := func() string {
		return []string{"session", "index", "role", "text_sha256", "a", "B", "z_9", "seq", ""}[r.IntN(9)]
	}
	scalar := func() any {
		switch r.IntN(5) {
		case 0:
			return str()
		case 1:
			return r.IntN(2) == 0
		case 2:
			return r.Int64N(2*maxExact+1) - maxExact
		case 3:
			return r.IntN(100) - 50
		}
		return int64(r.IntN(1000))
	}
	for i := range 5000 {
		data := map[string]any{}
		for range r.IntN(8) {
			data[key()] = scalar()
		}
		v := map[string]any{"at": str(), "data": data, "kind": str(), "seq": int64(i), "study": str()}
		if i%7 == 0 {
			v["data"] = map[string]int64{"session": r.Int64N(1 << 40)}
		}
		if i%11 == 0 {
			v["data"] = map[string]string{"ref": str(), "by": str()}
		}
		want, err := Marshal(v)
		if err != nil {
			t.Fatal(err)
		}
		got, ok := AppendFlat([]byte("prefix"), v)
		if !ok || !bytes.Equal(got, append([]byte("prefix"), want...)) {
			t.Fatalf("value %#v:\ngot  %q (ok %v)\nwant %q", v, got, ok, want)
		}
	}
	for _, v := range []any{
		nil, 1.5, []any{1}, struct{ A int }{1}, "bad \xff utf-8", map[string]any{"é": 1},
		int64(maxExact + 1), -int64(maxExact) - 1, map[string]any{"a": map[string]any{"b": 0.5}},
	} {
		if got, ok := AppendFlat([]byte("x"), v); ok || string(got) != "x" {
			t.Errorf("%#v: got %q, %v; want it declined and dst unchanged", v, got, ok)
		}
	}
}

func BenchmarkChainRecord(b *testing.B) {
	v := map[string]any{"at": "2026-12-01T10:00:00.000Z", "kind": "turn", "seq": int64(41235), "study": "quillhaven-cable-car",
		"data": map[string]any{"session": int64(8812), "index": 3, "role": "assistant", "text_sha256": strings.Repeat("ab", 32),
			"system_sha256": strings.Repeat("cd", 32), "request_sha256": strings.Repeat("ef", 32), "model_requested": "model-a",
			"model_reported": "model-a-2026", "fingerprint": "fp_01", "retries": 0, "study_hash": strings.Repeat("01", 32)}}
	b.Run("Marshal", func(b *testing.B) {
		for b.Loop() {
			if _, err := Marshal(v); err != nil {
				b.Fatal(err)
			}
		}
	})
	b.Run("AppendFlat", func(b *testing.B) {
		var buf []byte
		for b.Loop() {
			buf, _ = AppendFlat(buf[:0], v)
		}
	})
}

// FuzzAppendFlat: for any text and number in a chain-record shape,
// AppendFlat agrees with Marshal or declines.
func FuzzAppendFlat(f *testing.F) {
	f.Add("turn", "quillhaven", int64(7), true)
	f.Add("\x00\"\\\u2028", "é𝄞", int64(-maxExact), false)
	f.Fuzz(func(t *testing.T, a, b string, n int64, yes bool) {
		v := map[string]any{"at": a, "kind": b, "seq": n, "data": map[string]any{"k": a, "n": n, "yes": yes, b: a}}
		got, ok := AppendFlat(nil, v)
		if !ok {
			return
		}
		want, err := Marshal(v)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(got, want) {
			t.Fatalf("got %q, want %q", got, want)
		}
	})
}
