package main

import (
	"bytes"
	"context"
	"database/sql"
	"fmt"
	"io"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// fastDemo is the demo study with its scripted delay removed.
func fastDemo(t *testing.T) string {
	t.Helper()
	src, err := os.ReadFile(demoStudy)
	if err != nil {
		t.Fatal(err)
	}
	p := filepath.Join(t.TempDir(), "demo-fast.yaml")
	if err := os.WriteFile(p, bytes.Replace(src, []byte("delay: 600ms"), []byte("delay: 0s"), 1), 0o600); err != nil {
		t.Fatal(err)
	}
	return p
}

func runCmd(t *testing.T, args ...string) (int, string) {
	t.Helper()
	var out, errb bytes.Buffer
	code := run(context.Background(), args, &out, &errb)
	return code, out.String() + errb.String()
}

// TestVerifyAndBundle: on the demo study, respondents are run through the
// HTTP API; verify passes on the database; after closing, a bundle verifies
// offline with the allocation audit; one flipped character in one turn makes
// verify fail and name that turn.
func TestVerifyAndBundle(t *testing.T) {
	dir := t.TempDir()
	db := filepath.Join(dir, "v.db")
	m := &Main{}
	var errb bytes.Buffer
	if err := m.ParseFlags([]string{"--addr", "127.0.0.1:0", "--db", db, "--study", fastDemo(t)}, false, &errb); err != nil {
		t.Fatal(err)
	}
	if err := m.Run(context.Background()); err != nil {
		t.Fatal(err)
	}
	base := "http://" + m.Listener.Addr().String()
	noRedirect := &http.Client{CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	for i := range 12 {
		lean := []string{"left", "centre", "right"}[i%3]
		res, err := noRedirect.Get(fmt.Sprintf("%s/s/quillhaven-cable-car?rid=V-%d&age=44&lean=%s&stance=favour", base, i, lean))
		if err != nil {
			t.Fatal(err)
		}
		res.Body.Close()
		c := base + res.Header.Get("Location")
		post := func(path, body string) {
			res, err := http.Post(c+path, "application/json", strings.NewReader(body))
			if err != nil {
				t.Fatal(err)
			}
			io.Copy(io.Discard, res.Body)
			res.Body.Close()
		}
		post("/resume", "")
		for j := range 3 {
			post("/reply", fmt.Sprintf(`{"text":"My reply number %d here","client_id":"v%d"}`, j, j))
		}
	}
	if err := m.Close(); err != nil {
		t.Fatal(err)
	}

	code, out := runCmd(t, "verify", "--db", db, "--study", "quillhaven-cable-car")
	if code != exitOK || !strings.Contains(out, "Chain holds") || !strings.Contains(out, "Allocation audit: every assignment") {
		t.Fatalf("verify --db: exit %d\n%s", code, out)
	}
	sealed := filepath.Join(dir, "sealed.tar.gz")
	if code, out := runCmd(t, "bundle", "--db", db, "--study", "quillhaven-cable-car", "--out", sealed); code != exitOK || !strings.Contains(out, "sealed") {
		t.Fatalf("bundle before closing: exit %d\n%s", code, out)
	}
	if code, out := runCmd(t, "verify", sealed); code != exitOK || !strings.Contains(out, "seed is sealed") {
		t.Fatalf("verify sealed bundle: exit %d\n%s", code, out)
	}
	if code, out := runCmd(t, "close", "--db", db, "--study", "quillhaven-cable-car"); code != exitOK {
		t.Fatalf("close: exit %d\n%s", code, out)
	}
	bundle := filepath.Join(dir, "b.tar.gz")
	if code, out := runCmd(t, "bundle", "--db", db, "--study", "quillhaven-cable-car", "--out", bundle); code != exitOK || !strings.Contains(out, "seed is included") {
		t.Fatalf("bundle: exit %d\n%s", code, out)
	}
	if code, out := runCmd(t, "verify", bundle); code != exitOK || !strings.Contains(out, "verified") || !strings.Contains(out, "Allocation audit: every assignment") {
		t.Fatalf("verify bundle: exit %d\n%s", code, out)
	}

	t.Run("ErrFlippedCharacter", func(t *testing.T) {
		conn, err := sql.Open("sqlite", "file:"+db)
		if err != nil {
			t.Fatal(err)
		}
		var session, index int
		if err := conn.QueryRow(`SELECT session_id, idx FROM turns WHERE text = 'My reply number 1 here' ORDER BY session_id LIMIT 1`).Scan(&session, &index); err != nil {
			t.Fatal(err)
		}
		if _, err := conn.Exec(`UPDATE turns SET text = 'My reply number 7 here' WHERE session_id = ? AND idx = ?`, session, index); err != nil {
			t.Fatal(err)
		}
		conn.Close()
		code, out := runCmd(t, "verify", "--db", db, "--study", "quillhaven-cable-car")
		want := fmt.Sprintf("turn %d of session %d: its text was changed", index, session)
		if code != exitFail || !strings.Contains(out, want) {
			t.Fatalf("got exit %d, want 1 naming %q:\n%s", code, want, out)
		}
	})
	t.Run("ErrBundleExitStatuses", func(t *testing.T) {
		raw, err := os.ReadFile(bundle)
		if err != nil {
			t.Fatal(err)
		}
		cut := filepath.Join(dir, "cut.tar.gz")
		os.WriteFile(cut, raw[:len(raw)/3], 0o600)
		if code, out := runCmd(t, "verify", cut); code != exitArchive {
			t.Fatalf("truncated bundle: got exit %d, want %d\n%s", code, exitArchive, out)
		}
		if code, _ := runCmd(t, "verify", filepath.Join(dir, "absent.tar.gz")); code != exitUsage {
			t.Fatalf("absent bundle: got exit %d, want %d", code, exitUsage)
		}
		if code, _ := runCmd(t, "verify", "--db", db, "--study", "no-such-study"); code != exitUsage {
			t.Fatalf("unknown study: got exit %d, want %d", code, exitUsage)
		}
	})
}
