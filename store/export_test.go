package store_test

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"slices"
	"strconv"
	"strings"
	"testing"

	"trialogue/arms/codes"
	"trialogue/store"
)

// readCSV reads an export file with encoding/csv, which implements RFC
// 4180, strictly: every record must have as many fields as the header.
func readCSV(t *testing.T, path string) (header []string, rows []map[string]string) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	if bytes.HasPrefix(b, []byte("\xef\xbb\xbf")) {
		t.Fatalf("%s starts with a byte-order mark", path)
	}
	r := csv.NewReader(bytes.NewReader(b))
	r.FieldsPerRecord = 0 // the header's count, for every record
	recs, err := r.ReadAll()
	if err != nil {
		t.Fatalf("read %s with encoding/csv: %v", path, err)
	}
	if len(recs) == 0 {
		t.Fatalf("%s has no header row", path)
	}
	// RFC 4180, section 2, rule 1: each record ends with CRLF.
	if !bytes.HasSuffix(b, []byte("\r\n")) || bytes.Count(b, []byte("\r\n")) < len(recs) {
		t.Fatalf("%s: got records not ended by CRLF", path)
	}
	header = recs[0]
	for _, rec := range recs[1:] {
		row := map[string]string{}
		for i, v := range rec {
			row[header[i]] = v
		}
		rows = append(rows, row)
	}
	return header, rows
}

// readJSONL reads turns.jsonl, keeping each line's key order.
func readJSONL(t *testing.T, path string) (keys [][]string, rows []map[string]any) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	for i, line := range strings.Split(strings.TrimSuffix(string(b), "\n"), "\n") {
		if line == "" {
			continue
		}
		var row map[string]any
		if err := json.Unmarshal([]byte(line), &row); err != nil {
			t.Fatalf("line %d of %s: %v", i+1, path, err)
		}
		dec := json.NewDecoder(strings.NewReader(line))
		var order []string
		dec.Token() // {
		for dec.More() {
			k, err := dec.Token()
			if err != nil {
				t.Fatal(err)
			}
			order = append(order, k.(string))
			var skip json.RawMessage
			if err := dec.Decode(&skip); err != nil {
				t.Fatal(err)
			}
		}
		keys = append(keys, order)
		rows = append(rows, row)
	}
	return keys, rows
}

// csvText is what a CSV reader gives back for a stored text: RFC 4180
// files hold line breaks as CRLF, which encoding/csv reads as LF.
func csvText(s string) string {
	return strings.ReplaceAll(strings.ReplaceAll(s, "\r\n", "\n"), "\r", "\n")
}

func TestExport(t *testing.T) {
	ctx := context.Background()
	sc := newScenario(t)
	export := func(t *testing.T, opt store.ExportOptions) (string, store.ExportSummary) {
		t.Helper()
		dir := filepath.Join(t.TempDir(), "export")
		sum, err := sc.st.Export(ctx, sc.def, sc.def.ID, dir, opt)
		if err != nil {
			t.Fatal(err)
		}
		return dir, sum
	}

	t.Run("OK", func(t *testing.T) {
		dir, sum := export(t, store.ExportOptions{})
		if sum.Sessions != 3 || sum.Pilot != 1 || sum.Synthetic != 1 || sum.Masks != 0 {
			t.Fatalf("got summary %+v, want 3 sessions with 1 pilot and 1 synthetic left out, no masks", sum)
		}
		entries, err := os.ReadDir(dir)
		if err != nil {
			t.Fatal(err)
		}
		var files []string
		for _, e := range entries {
			files = append(files, e.Name())
		}
		if want := []string{"codebook.md", "sessions.csv", "turns.csv", "turns.jsonl"}; !slices.Equal(files, want) {
			t.Fatalf("got files %v, want %v (no temporary files left)", files, want)
		}

		header, rows := readCSV(t, filepath.Join(dir, "sessions.csv"))
		var rids []string
		byRID := map[string]map[string]string{}
		for _, r := range rows {
			rids = append(rids, r["rid"])
			byRID[r["rid"]] = r
		}
		if want := []string{ridAlder, ridBirch, ridElm}; !slices.Equal(rids, want) {
			t.Fatalf("got sessions %v, want %v in order of entry", rids, want)
		}
		wantHeader := []string{"session", "rid", "phase", "synthetic", "arm", "arm_code", "stratum", "cov_age", "cov_lean", "cov_stance", "cov_district",
			"version", "version_hash", "language", "entered_at", "finished_at", "finished", "duration_s", "replies", "model_messages",
			"words_respondent", "words_model", "completion_code", "model_failures", "retries",
			"flag_conceded", "flag_revealed", "flag_refused", "flag_satisficed", "flag_pasted", "flag_errors", "flag_overtime",
			"reviewed", "excluded", "review_reason"}
		if !slices.Equal(header, wantHeader) {
			t.Fatalf("got sessions.csv header\n%v\nwant\n%v", header, wantHeader)
		}
		a := byRID[ridAlder]
		for col, want := range map[string]string{
			"session": strconv.FormatInt(sc.sess[ridAlder].ID, 10), "phase": "live", "synthetic": "0", "arm": "debate",
			"arm_code": sc.def.Arms["debate"].Code, "stratum": "lean=left", "cov_age": "47", "cov_district": "Mill Quarter",
			"version": "1", "version_hash": sc.sv.Hash, "language": "en",
			"entered_at": "2027-05-03T08:00:00.000Z", "finished_at": "2027-05-03T08:05:00.000Z", "finished": "1", "duration_s": "300.000",
			"replies": "2", "model_messages": "3",
			"completion_code": codes.Completion(sc.sv.Secret, sc.def.ID, ridAlder), "model_failures": "0", "retries": "1",
			"flag_conceded": "1", "flag_revealed": "0", "flag_refused": "0", "flag_satisficed": "0", "flag_pasted": "1", "flag_errors": "1", "flag_overtime": "0",
			"reviewed": "0", "excluded": "0", "review_reason": "",
		} {
			if a[col] != want {
				t.Fatalf("%s of %s: got %q, want %q", col, ridAlder, a[col], want)
			}
		}
		// Words counted independently of arms.CountWords, by a regular
		// expression for the same definition (runs of letters, digits and
		// marks, joined by an apostrophe; no Han or kana in these texts).
		word := regexp.MustCompile(`[\p{L}\p{N}\p{M}]+(?:['’][\p{L}\p{N}\p{M}]+)*`)
		words := func(texts ...string) string {
			n := 0
			for _, s := range texts {
				n += len(word.FindAllString(s, -1))
			}
			return strconv.Itoa(n)
		}
		tx := sc.texts[ridAlder]
		if got, want := a["words_respondent"], words(tx[1], tx[3]); got != want {
			t.Fatalf("words_respondent: got %s, want %s", got, want)
		}
		if got, want := a["words_model"], words(tx[0], tx[2], tx[4]); got != want {
			t.Fatalf("words_model: got %s, want %s", got, want)
		}
		if !codes.VerifyCompletion(sc.sv.Secret, sc.def.ID, ridAlder, a["completion_code"]) {
			t.Fatalf("completion code %q does not verify", a["completion_code"])
		}
		b := byRID[ridBirch]
		if b["reviewed"] != "1" || b["excluded"] != "1" || !strings.HasPrefix(b["review_reason"], "Duplicate of another entry") || b["cov_district"] != "" || b["replies"] != "0" {
			t.Fatalf("got %s row %v, want reviewed, excluded with its reason, no district, no replies", ridBirch, b)
		}
		e := byRID[ridElm]
		if e["finished"] != "0" || e["finished_at"] != "" || e["duration_s"] != "" || e["model_failures"] != "1" ||
			e["flag_revealed"] != "1" || e["flag_overtime"] != "1" || e["flag_errors"] != "1" {
			t.Fatalf("got %s row %v, want unfinished with a failure, revealed, overtime and errors", ridElm, e)
		}

		theader, turns := readCSV(t, filepath.Join(dir, "turns.csv"))
		keys, jrows := readJSONL(t, filepath.Join(dir, "turns.jsonl"))
		if len(turns) != sum.Turns || len(jrows) != sum.Turns || sum.Turns != 6 {
			t.Fatalf("got %d CSV turns, %d JSON lines, summary %d; want 6 of each", len(turns), len(jrows), sum.Turns)
		}
		var want []string
		for _, rid := range []string{ridAlder, ridBirch, ridElm} {
			want = append(want, sc.texts[rid]...)
		}
		for i := range turns {
			if !slices.Equal(keys[i], theader) {
				t.Fatalf("line %d of turns.jsonl: got keys %v, want the CSV header %v", i+1, keys[i], theader)
			}
			if turns[i]["text"] != csvText(want[i]) {
				t.Fatalf("turns.csv row %d: got text %q, want %q", i+1, turns[i]["text"], csvText(want[i]))
			}
			if jrows[i]["text"] != want[i] {
				t.Fatalf("turns.jsonl line %d: got text %q, want it exactly as stored, %q", i+1, jrows[i]["text"], want[i])
			}
			if jrows[i]["text_sha256"] != codes.SHA256Hex([]byte(want[i])) {
				t.Fatalf("turns.jsonl line %d: text_sha256 is not the hash of the text", i+1)
			}
		}
		// a reply: model fields empty (null), typing measures present
		if r := jrows[1]; r["role"] != "respondent" || r["latency_ms"] != nil || r["model_reported"] != nil ||
			r["typing_ms"] != float64(30000) || r["keystrokes"] != float64(80) || r["pastes"] != float64(0) {
			t.Fatalf("got reply line %v, want null model fields and the typing measures", r)
		}
		if r := turns[2]; r["role"] != "assistant" || r["latency_ms"] != "1500" || r["model_reported"] != "example-chat-2027-01-b" ||
			r["typing_ms"] != "" || r["prompt_tokens"] != "120" || r["index"] != "2" || r["masks"] != "0" {
			t.Fatalf("got model row %v, want its model fields and no typing measures", r)
		}

		cb, err := os.ReadFile(filepath.Join(dir, "codebook.md"))
		if err != nil {
			t.Fatal(err)
		}
		for _, col := range append(header, theader...) {
			if !strings.Contains(string(cb), "| `"+col+"` |") {
				t.Fatalf("codebook.md does not describe column %s", col)
			}
		}
		for _, want := range []string{"`left`, `centre`, `right`", "whole numbers from 18 to 99", "free text of at most 60 characters",
			"| lean | `cov_lean` | choice |", "| debate | " + sc.def.Arms["debate"].Code + " | chat | 1 |", "Pilot sessions: left out (1;",
			"RFC 4180", sc.sv.Hash} {
			if !strings.Contains(string(cb), want) {
				t.Fatalf("codebook.md lacks %q:\n%s", want, cb)
			}
		}
	})

	t.Run("OKReadByPythonCSV", func(t *testing.T) {
		dir, sum := export(t, store.ExportOptions{IncludePilot: true, IncludeSynthetic: true, Release: true})
		got := pythonReadBack(t, dir)
		for _, f := range []string{"sessions.csv", "turns.csv"} {
			header, rows := readCSV(t, filepath.Join(dir, f))
			py := got[f]
			if py.Rows != len(rows)+1 || len(py.Widths) != 1 || py.Widths[0] != len(header) || !slices.Equal(py.Header, header) {
				t.Fatalf("%s: Python's csv module read %d rows of widths %v, header %v; encoding/csv read %d rows of %d columns",
					f, py.Rows, py.Widths, py.Header, len(rows)+1, len(header))
			}
		}
		if got["sessions.csv"].Rows != sum.Sessions+1 || got["turns.jsonl"].Rows != sum.Turns {
			t.Fatalf("Python read %d session rows and %d JSON lines, want %d and %d", got["sessions.csv"].Rows, got["turns.jsonl"].Rows, sum.Sessions+1, sum.Turns)
		}
		_, jrows := readJSONL(t, filepath.Join(dir, "turns.jsonl"))
		for i, text := range got["turns.jsonl"].Texts {
			if text != jrows[i]["text"] {
				t.Fatalf("line %d: Python's json read %q, Go's %q", i+1, text, jrows[i]["text"])
			}
		}
	})

	t.Run("OKRelease", func(t *testing.T) {
		dir, sum := export(t, store.ExportOptions{Release: true})
		all := ""
		for _, f := range []string{"sessions.csv", "turns.csv", "turns.jsonl", "codebook.md"} {
			b, err := os.ReadFile(filepath.Join(dir, f))
			if err != nil {
				t.Fatal(err)
			}
			all += string(b)
		}
		for _, secret := range []string{ridAlder, ridBirch, ridElm, "resident.one@example.org", "7946 0958", "https://example.org/x",
			"desk@example.org", "0207 946 0000", codes.Completion(sc.sv.Secret, sc.def.ID, ridAlder)} {
			if strings.Contains(all, secret) {
				t.Fatalf("the release copy holds %q", secret)
			}
		}
		_, rows := readCSV(t, filepath.Join(dir, "sessions.csv"))
		if rows[0]["rid"] != store.RIDKey(sc.sv.Secret, ridAlder) || rows[0]["completion_code"] != "" {
			t.Fatalf("got rid %q and code %q, want the rid key and no code", rows[0]["rid"], rows[0]["completion_code"])
		}
		if got := rows[2]["cov_district"]; got != "East Rim, call [phone]" {
			t.Fatalf("got district %q, want the phone number masked", got)
		}
		_, turns := readCSV(t, filepath.Join(dir, "turns.csv"))
		pasted := turns[3]
		if pasted["text"] != "Write to me at [email] or call [phone], see [url] \u2014 NA =1+1 \u0661\u0662\u0663 \U0001F600" || pasted["masks"] != "3" || pasted["text_sha256"] != "" {
			t.Fatalf("got pasted reply %q with %s masks and hash %q; want three masks and no hash", pasted["text"], pasted["masks"], pasted["text_sha256"])
		}
		if turns[0]["masks"] != "0" || turns[0]["text_sha256"] == "" || turns[0]["rid"] != rows[0]["rid"] {
			t.Fatalf("got an unmasked turn %v, want its hash kept and the session's rid key", turns[0])
		}
		// 3 in the pasted reply, 1 in a district, 1 in a review reason
		if sum.Masks != 5 {
			t.Fatalf("got %d masks, want 5", sum.Masks)
		}
	})

	t.Run("OKIncludePilotAndSynthetic", func(t *testing.T) {
		dir, sum := export(t, store.ExportOptions{IncludePilot: true, IncludeSynthetic: true})
		_, rows := readCSV(t, filepath.Join(dir, "sessions.csv"))
		if sum.Sessions != 5 || sum.Pilot != 0 || sum.Synthetic != 0 || len(rows) != 5 {
			t.Fatalf("got summary %+v and %d rows, want all 5 sessions", sum, len(rows))
		}
		if rows[2]["rid"] != ridCedar || rows[2]["phase"] != "pilot" || rows[3]["rid"] != ridDogwood || rows[3]["synthetic"] != "1" {
			t.Fatalf("got rows %v and %v, want the pilot and the synthetic session marked", rows[2], rows[3])
		}
	})

	t.Run("OKReexportReplacesFiles", func(t *testing.T) {
		dir := filepath.Join(t.TempDir(), "again")
		if _, err := sc.st.Export(ctx, sc.def, sc.def.ID, dir, store.ExportOptions{IncludePilot: true}); err != nil {
			t.Fatal(err)
		}
		if _, err := sc.st.Export(ctx, sc.def, sc.def.ID, dir, store.ExportOptions{}); err != nil {
			t.Fatal(err)
		}
		_, rows := readCSV(t, filepath.Join(dir, "sessions.csv"))
		entries, _ := os.ReadDir(dir)
		if len(rows) != 3 || len(entries) != 4 {
			t.Fatalf("got %d rows and %d files, want 3 rows of the second export and 4 files", len(rows), len(entries))
		}
	})

	t.Run("OKStudyWithoutSessions", func(t *testing.T) {
		st, def, _, _ := mustDemo(t)
		dir := filepath.Join(t.TempDir(), "empty")
		sum, err := st.Export(ctx, def, def.ID, dir, store.ExportOptions{})
		if err != nil {
			t.Fatal(err)
		}
		header, rows := readCSV(t, filepath.Join(dir, "sessions.csv"))
		if sum.Sessions != 0 || len(rows) != 0 || len(header) == 0 {
			t.Fatalf("got %d rows under a header of %d columns, want none under the full header", len(rows), len(header))
		}
		if b, _ := os.ReadFile(filepath.Join(dir, "turns.jsonl")); len(b) != 0 {
			t.Fatalf("got turns.jsonl %q, want it empty", b)
		}
	})

	t.Run("ErrUnknownStudy", func(t *testing.T) {
		other := *sc.def
		other.ID = "no-such-study"
		dir := filepath.Join(t.TempDir(), "unknown")
		_, err := sc.st.Export(ctx, &other, other.ID, dir, store.ExportOptions{})
		if !errors.Is(err, store.ErrNotFound) {
			t.Fatalf("got %v, want ErrNotFound", err)
		}
		if _, err := os.Stat(dir); !errors.Is(err, os.ErrNotExist) {
			t.Fatalf("an export of an unknown study created its folder (stat: %v)", err)
		}
	})

	t.Run("ErrDefinitionOfAnotherStudy", func(t *testing.T) {
		dir := filepath.Join(t.TempDir(), "other")
		if _, err := sc.st.Export(ctx, sc.def, "another-study", dir, store.ExportOptions{}); err == nil {
			t.Fatal("got no error for a definition of another study")
		}
		if _, err := os.Stat(dir); !errors.Is(err, os.ErrNotExist) {
			t.Fatalf("a refused export created its folder (stat: %v)", err)
		}
	})

	t.Run("ErrDestinationIsAFile", func(t *testing.T) {
		file := filepath.Join(t.TempDir(), "taken")
		if err := os.WriteFile(file, []byte("keep me"), 0o600); err != nil {
			t.Fatal(err)
		}
		if _, err := sc.st.Export(ctx, sc.def, sc.def.ID, file, store.ExportOptions{}); err == nil {
			t.Fatal("got no error exporting into a file")
		}
		if b, _ := os.ReadFile(file); string(b) != "keep me" {
			t.Fatalf("the file in the way now holds %q", b)
		}
	})
}

// pyFile is what Debian's Python read of one export file.
type pyFile struct {
	Rows   int      `json:"rows"`
	Widths []int    `json:"widths"` // the distinct numbers of fields per row
	Header []string `json:"header"`
	Texts  []string `json:"texts"` // turns.jsonl: the text of each line
}

// readBack reads the export with Python's csv module (newline="" as its
// documentation requires, the default dialect "excel", which is RFC 4180's
// format) and its json module.
const readBack = `import csv, json, os, sys
d = sys.argv[1]
out = {}
for name in ("sessions.csv", "turns.csv"):
    with open(os.path.join(d, name), newline="", encoding="utf-8") as f:
        rows = list(csv.reader(f, strict=True))
    out[name] = {"rows": len(rows), "widths": sorted({len(r) for r in rows}), "header": rows[0], "texts": []}
with open(os.path.join(d, "turns.jsonl"), encoding="utf-8") as f:
    lines = [json.loads(l) for l in f]
out["turns.jsonl"] = {"rows": len(lines), "widths": sorted({len(l) for l in lines}), "header": [], "texts": [l["text"] for l in lines]}
print(json.dumps(out))
`

// pythonReadBack runs readBack with Debian's python3; without it the test
// skips, unless TRIALOGUE_REQUIRE_REFERENCE=1 makes that a failure.
func pythonReadBack(t *testing.T, dir string) map[string]pyFile {
	t.Helper()
	const python = "/usr/bin/python3"
	if _, err := os.Stat(python); err != nil {
		if os.Getenv("TRIALOGUE_REQUIRE_REFERENCE") == "1" {
			t.Fatalf("TRIALOGUE_REQUIRE_REFERENCE=1 but %s is missing: %v", python, err)
		}
		t.Skipf("%s is missing; install python3 or set TRIALOGUE_REQUIRE_REFERENCE=1 to make this a failure", python)
	}
	out, err := exec.Command(python, "-c", readBack, dir).Output()
	if err != nil {
		var ee *exec.ExitError
		if errors.As(err, &ee) {
			t.Fatalf("python: %v\n%s", err, ee.Stderr)
		}
		t.Fatal(err)
	}
	var got map[string]pyFile
	if err := json.Unmarshal(out, &got); err != nil {
		t.Fatalf("python output %q: %v", out, err)
	}
	return got
}
