package arms

import (
	"errors"
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"
)

// demoPath is the demo study shipped with the repository.
const demoPath = "../testdata/demo-study.yaml"

// studiesDir holds small study fixtures, valid and broken.
const studiesDir = "../testdata/studies"

// mustParseFile parses a study file that must be valid.
func mustParseFile(tb testing.TB, path string) *Study {
	tb.Helper()
	s, _, err := ParseFile(path)
	if err != nil {
		tb.Fatalf("ParseFile(%q): %v", path, err)
	}
	return s
}

// mustRead reads a fixture.
func mustRead(tb testing.TB, path string) []byte {
	tb.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		tb.Fatal(err)
	}
	return b
}

// edit applies old/new replacements to src, each of which must match once,
// so a broken variant of a fixture states exactly what it changes.
func edit(tb testing.TB, src string, pairs ...string) string {
	tb.Helper()
	for i := 0; i+1 < len(pairs); i += 2 {
		if n := strings.Count(src, pairs[i]); n != 1 {
			tb.Fatalf("edit: %q occurs %d times, want 1", pairs[i], n)
		}
		src = strings.Replace(src, pairs[i], pairs[i+1], 1)
	}
	return src
}

// problemsOf returns the *Problems behind err, failing when there is none.
func problemsOf(tb testing.TB, err error) *Problems {
	tb.Helper()
	var ps *Problems
	if !errors.As(err, &ps) {
		tb.Fatalf("got error %v (%T), want *Problems", err, err)
	}
	return ps
}

// want is one expected problem: its position and part of its message.
type want struct {
	line, col int
	msg       string
}

// checkProblems compares every problem found, in order, with want.
func checkProblems(tb testing.TB, err error, wants []want) {
	tb.Helper()
	ps := problemsOf(tb, err)
	if len(ps.List) != len(wants) {
		tb.Errorf("got %d problems, want %d:\n%v", len(ps.List), len(wants), err)
	}
	for i := range min(len(ps.List), len(wants)) {
		got, w := ps.List[i], wants[i]
		if got.Line != w.line || got.Col != w.col || !strings.Contains(got.Msg, w.msg) {
			tb.Errorf("problem %d: got %d:%d %q, want %d:%d containing %q", i, got.Line, got.Col, got.Msg, w.line, w.col, w.msg)
		}
	}
}

func TestParseDemo(t *testing.T) {
	s := mustParseFile(t, demoPath)

	t.Run("OK", func(t *testing.T) {
		if s.ID != "quillhaven-cable-car" {
			t.Errorf("ID: got %q, want %q", s.ID, "quillhaven-cable-car")
		}
	})
	t.Run("ArmOrderFollowsFile", func(t *testing.T) {
		wantOrder := []string{"notice", "letter", "tailored", "debate", "reflect", "chit-chat"}
		if !slices.Equal(s.ArmOrder, wantOrder) {
			t.Fatalf("ArmOrder: got %v, want %v", s.ArmOrder, wantOrder)
		}
		for i, name := range wantOrder {
			wantCode := "A" + string(rune('1'+i))
			if got := s.Arms[name].Code; got != wantCode {
				t.Errorf("arm %s code: got %q, want %q", name, got, wantCode)
			}
			if got, ok := s.ArmByCode(wantCode); !ok || got != name {
				t.Errorf("ArmByCode(%q): got %q, %v, want %q, true", wantCode, got, ok, name)
			}
		}
		sc := s.Scheme()
		var schemeOrder []string
		for _, r := range sc.Arms {
			schemeOrder = append(schemeOrder, r.Arm)
		}
		if !slices.Equal(schemeOrder, wantOrder) {
			t.Errorf("Scheme arms: got %v, want %v", schemeOrder, wantOrder)
		}
	})
	t.Run("DefaultsApplied", func(t *testing.T) {
		if s.Language != "en" {
			t.Errorf("Language: got %q, want en", s.Language)
		}
		if got := s.Arms["reflect"].Replies.MaxChars; got != DefaultMaxChars {
			t.Errorf("reflect max_chars: got %d, want %d", got, DefaultMaxChars)
		}
		off := s.Endpoints["offline"]
		if time.Duration(off.Timeout) != DefaultTimeout || off.Attempts != DefaultAttempts {
			t.Errorf("offline timeout, attempts: got %v, %d, want %v, %d", time.Duration(off.Timeout), off.Attempts, DefaultTimeout, DefaultAttempts)
		}
		if off.Model != "scripted" {
			t.Errorf("offline model: got %q, want scripted", off.Model)
		}
		hosted := s.Endpoints["hosted"]
		if time.Duration(hosted.Timeout) != 45*time.Second {
			t.Errorf("hosted timeout: got %v, want 45s as written", time.Duration(hosted.Timeout))
		}
		if time.Duration(off.Delay) != 600*time.Millisecond || off.Chunks != 12 {
			t.Errorf("offline delay, chunks: got %v, %d, want 600ms, 12", time.Duration(off.Delay), off.Chunks)
		}
		district, ok := s.Covariate("district")
		if !ok || district.MaxLen != 60 {
			t.Errorf("district max_len: got %d, %v, want 60, true", district.MaxLen, ok)
		}
	})
	t.Run("DefaultLanguageWhenOmitted", func(t *testing.T) {
		m := mustParseFile(t, filepath.Join(studiesDir, "minimal.yaml"))
		if m.Language != "en" {
			t.Errorf("Language: got %q, want en", m.Language)
		}
	})
}

func TestParseFileTooLarge(t *testing.T) {
	path := filepath.Join(t.TempDir(), "big.yaml")
	if err := os.WriteFile(path, make([]byte, MaxStudyFileSize+1), 0o600); err != nil {
		t.Fatal(err)
	}
	_, _, err := ParseFile(path)
	if err == nil || !strings.Contains(err.Error(), "the limit is") {
		t.Errorf("got %v, want an error naming the size limit", err)
	}
	_, err = Parse("big.yaml", make([]byte, MaxStudyFileSize+1))
	checkProblems(t, err, []want{{1, 1, "the limit is"}})
}

// TestParseBrokenFixtures checks each broken study in testdata/studies for
// the exact position and message of every problem. Syntax errors follow
// YAML 1.2.2 (https://yaml.org/spec/1.2.2/): tabs may not indent (section
// 6.1) and a double-quoted scalar needs its closing quote (section 7.3.1).
func TestParseBrokenFixtures(t *testing.T) {
	tests := []struct {
		name, file string
		wants      []want
	}{
		{"ErrUnknownField", "unknown-field.yaml", []want{{15, 5, `unknown field "replys"`}}},
		{"ErrAllocationMismatch", "allocation-mismatch.yaml", []want{
			{5, 21, `allocation names arm "ferry", which is not declared`},
			{12, 3, `arm "talk" has no ratio under allocation.arms`},
		}},
		{"ErrUndeclaredTemplateNames", "template-refs.yaml", []want{
			{20, 13, "template refers to .vars.sied, which the arm does not declare"},
			{20, 13, "template refers to .age, which is not a declared covariate"},
		}},
		{"ErrStratumNotChoiceOrRequired", "strata-bad.yaml", []want{
			{6, 10, `stratum "age" must be a choice covariate`},
			{6, 15, `stratum "stance" must be a required covariate`},
		}},
		{"ErrTabIndentation", "tab-indent.yaml", []want{{4, 1, "cannot start any token"}}},
		{"ErrUnclosedQuote", "unclosed-quote.yaml", []want{{2, 8, "could not find end character of double-quoted text"}}},
		{"ErrEmptyCommentsOnly", "empty.yaml", []want{{1, 1, "the study file is empty"}}},
		{"ErrManySortedByLine", "many-errors.yaml", []want{
			{5, 12, `covariate "stance" is declared twice`},
			{7, 12, "block size 5 is not a positive multiple of 3"},
			{11, 3, `endpoint "hosted" needs base_url`},
			{11, 3, `endpoint "hosted" needs a model name`},
			{13, 3, `fixed arm "notice" needs a text`},
			{18, 11, `arms "notice" and "talk" share the code "X1"`},
			{19, 15, `uses endpoint "nowhere", which is not declared`},
			{20, 20, "replies min 4 is greater than max 2"},
			{23, 11, `arm "ask" has kind "poll"`},
			{24, 9, "{{.code}}"},
		}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			path := filepath.Join(studiesDir, tt.file)
			s, _, err := ParseFile(path)
			if s != nil {
				t.Fatalf("got a study, want problems")
			}
			checkProblems(t, err, tt.wants)
			if ps := problemsOf(t, err); ps.File != path {
				t.Errorf("Problems.File: got %q, want %q", ps.File, path)
			}
		})
	}
}

// TestParseBrokenEdits breaks the minimal fixture one way at a time. The
// line and column of each problem are those of the fixture after the edit.
func TestParseBrokenEdits(t *testing.T) {
	base := string(mustRead(t, filepath.Join(studiesDir, "minimal.yaml")))
	if _, err := Parse("minimal.yaml", []byte(base)); err != nil {
		t.Fatalf("the unedited fixture: got %v, want no error", err)
	}
	tests := []struct {
		name  string
		edits []string
		wants []want
	}{
		{"ErrRepliesMinAboveMax", []string{"{min: 1, max: 3}", "{min: 4, max: 3}"},
			[]want{{20, 20, "replies min 4 is greater than max 3"}}},
		{"ErrUnknownEndpoint", []string{"endpoint: offline", "endpoint: nowhere"},
			[]want{{19, 15, `arm "talk" uses endpoint "nowhere", which is not declared under endpoints`}}},
		{"ErrUnknownArmKind", []string{"kind: fixed", "kind: poster"},
			[]want{{15, 11, `arm "notice" has kind "poster"; use fixed, message or chat`}}},
		{"ErrUnknownEndpointKind", []string{"{kind: scripted}", "{kind: telepathy}"},
			[]want{{12, 19, `endpoint "offline" has kind "telepathy"`}}},
		{"ErrOpenAIWithoutBaseURLAndModel", []string{"{kind: scripted}", "{kind: openai}"},
			[]want{
				{12, 3, `endpoint "offline" needs base_url`},
				{12, 3, `endpoint "offline" needs a model name`},
			}},
		{"ErrBlockNotMultipleOfRatios", []string{"blocks: [2, 4]", "blocks: [2, 3]"},
			[]want{{9, 15, "block size 3 is not a positive multiple of 2"}}},
		{"ErrRatioZero", []string{"{notice: 1, talk: 1}", "{notice: 1, talk: 0}"},
			[]want{{10, 9, `arm "talk" has weight 0`}}},
		{"ErrReturnWithoutCode", []string{"&code={{.code}}", ""},
			[]want{{22, 9, "return must pass the completion code back to the survey with {{.code}}"}}},
		{"ErrReturnUnknownField", []string{"{{.code}}", "{{.code}}&x={{.age}}"},
			[]want{{22, 9, ".age is not one of them"}}},
		{"ErrReturnNotAbsolute", []string{"https://survey.example.org/back", "/back"},
			[]want{{22, 9, "return must be an absolute http(s) address"}}},
		{"ErrDuplicateCovariate", []string{"name: stance", "name: age", "strata: [stance]", "strata: []"},
			[]want{{6, 12, `covariate "age" is declared twice`}}},
		{"ErrReservedCovariate", []string{"name: age", "name: rid"},
			[]want{{5, 12, `"rid" is reserved`}}},
		{"ErrStratumUndeclared", []string{"strata: [stance]", "strata: [county]"},
			[]want{{7, 10, `stratum "county" is not a declared covariate`}}},
		{"ErrDuplicateArmCode", []string{
			"    kind: fixed\n", "    kind: fixed\n    code: T1\n",
			"    kind: chat\n", "    kind: chat\n    code: T1\n",
		}, []want{{20, 11, `arms "notice" and "talk" share the code "T1"`}}},
		{"ErrDefaultCodeTaken", []string{"    kind: fixed\n", "    kind: fixed\n    code: A2\n"},
			[]want{{18, 3, `arms "notice" and "talk" share the code "A2"`}}},
		{"ErrFixedWithoutText", []string{"    text: Fernbrook plans a footbridge over the Lowmere stream.\n", ""},
			[]want{{14, 3, `fixed arm "notice" needs a text`}}},
		{"ErrFixedWithPrompt", []string{"    kind: fixed\n", "    kind: fixed\n    prompt: Say hello.\n"},
			[]want{{14, 3, `fixed arm "notice" shows a text only`}}},
		{"ErrChatWithoutReplies", []string{"    replies: {min: 1, max: 3}\n", ""},
			[]want{{17, 3, `chat arm "talk" needs replies`}}},
		{"ErrTemplateDoesNotParse", []string{"about the footbridge.", "about {{.stance"},
			[]want{{21, 13, "template does not parse"}}},
		{"ErrTemplateDollarUndeclared", []string{"about the footbridge.", "aged {{$.agee}}."},
			[]want{{21, 13, "template refers to .agee, which is not a declared covariate"}}},
		{"ErrVarsReferToVars", []string{"    system:", "    vars: {side: '{{.vars.x}}'}\n    system:"},
			[]want{{21, 18, "variables cannot refer to other variables"}}},
		{"ErrTemperatureNaN", []string{"{kind: scripted}", "{kind: scripted, temperature: .nan}"},
			[]want{{12, 42, "temperature must be between 0 and 2"}}},
		{"ErrTopPNaN", []string{"{kind: scripted}", "{kind: scripted, top_p: .NaN}"},
			[]want{{12, 36, "top_p must be above 0 and at most 1"}}},
		{"ErrSeedNotExactInJSON", []string{"{kind: scripted}", "{kind: scripted, seed: 12345678901234567}"},
			[]want{{12, 35, "so that the version hash records it exactly"}}},
		{"ErrCovariateMinNotExactInJSON", []string{"min: 18", "min: -9007199254740993"},
			[]want{{5, 37, "min of covariate \"age\" must be between"}}},
		{"ErrInvalidUTF8", []string{"Fernbrook footbridge", "Fernbrook \xff footbridge"},
			[]want{{3, 18, "not valid UTF-8"}}},
		// goccy/go-yaml issue 735: the decoder panics on this valid YAML
		// (YAML 1.2.2 section 7.2, empty nodes); Parse reports it instead.
		{"ErrTagWithoutValue", []string{"{{.code}}\"\n", "{{.code}}\"\nframe_ancestors: !!seq\n"},
			[]want{{23, 18, "the tag !!seq has no value"}}},
		{"ErrEmpty", []string{base, ""}, []want{{1, 1, "the study file is empty"}}},
		{"ErrEmptyDocumentMarker", []string{base, "---\n...\n"}, []want{{1, 1, "the study file is empty"}}},
		{"ErrNotAMapping", []string{base, "- just\n- a list\n"}, []want{{1, 1, "sequence was used where mapping is expected"}}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			src := edit(t, base, tt.edits...)
			s, err := Parse("edited.yaml", []byte(src))
			if s != nil {
				t.Fatalf("got a study, want problems")
			}
			checkProblems(t, err, tt.wants)
		})
	}
}

// TestParseAcceptedVariants are files written differently that must parse.
func TestParseAcceptedVariants(t *testing.T) {
	base := string(mustRead(t, filepath.Join(studiesDir, "minimal.yaml")))
	tests := []struct {
		name  string
		edits []string
	}{
		// YAML 1.2.2 section 6.9.2: an anchor is a node property and does
		// not change the node's content.
		{"OKAnchoredArms", []string{"arms:\n", "arms: &all\n"}},
		{"OKDollarTemplateField", []string{"about the footbridge.", "aged {{$.age}}."}},
		{"OKTemperatureBounds", []string{"{kind: scripted}", "{kind: scripted, temperature: 2, seed: 9007199254740991}"}},
		{"OKUTF8Text", []string{"Fernbrook footbridge", "Fernbrook footbridge — Ωμέγα, 橋"}},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			s, err := Parse("variant.yaml", []byte(edit(t, base, tt.edits...)))
			if err != nil {
				t.Fatalf("got %v, want no error", err)
			}
			if !slices.Equal(s.ArmOrder, []string{"notice", "talk"}) {
				t.Errorf("ArmOrder: got %v, want [notice talk]", s.ArmOrder)
			}
			if s.Arms["talk"].Code != "A2" {
				t.Errorf("talk code: got %q, want A2", s.Arms["talk"].Code)
			}
		})
	}
}

func TestProblemsError(t *testing.T) {
	t.Run("OK", func(t *testing.T) {
		ps := &Problems{File: "studies/x.yaml", List: []Problem{
			{Line: 3, Col: 7, Msg: "title is missing"},
			{Line: 12, Col: 1, Msg: "return is missing"},
		}}
		got := ps.Error()
		wantText := "studies/x.yaml:3:7: title is missing\nstudies/x.yaml:12:1: return is missing"
		if got != wantText {
			t.Errorf("got %q, want %q", got, wantText)
		}
	})
	t.Run("FromParse", func(t *testing.T) {
		_, _, err := ParseFile(filepath.Join(studiesDir, "strata-bad.yaml"))
		lines := strings.Split(err.Error(), "\n")
		prefix := filepath.Join(studiesDir, "strata-bad.yaml") + ":6:10: stratum \"age\""
		if len(lines) != 2 || !strings.HasPrefix(lines[0], prefix) {
			t.Errorf("got %q, want 2 lines, the first starting %q", err.Error(), prefix)
		}
	})
}
