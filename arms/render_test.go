package arms

import (
	"net/url"
	"path/filepath"
	"strings"
	"testing"
)

// respondent builds a respondent of the demo study.
func respondent(age, lean, stance string) Respondent {
	return Respondent{RID: "R1", Covariates: map[string]string{"age": age, "lean": lean, "stance": stance}}
}

func TestRender(t *testing.T) {
	s := mustParseFile(t, demoPath)

	t.Run("OKDebatePositionFlips", func(t *testing.T) {
		tests := []struct{ stance, want, notWant string }{
			{"favour", "Argue against the cable car,", "Argue for the cable car"},
			{"against", "Argue for the cable car,", "Argue against the cable car"},
			{"unsure", "Argue for the cable car,", "Argue against the cable car"},
		}
		for _, tt := range tests {
			got, err := s.Render("debate", respondent("40", "left", tt.stance))
			if err != nil {
				t.Fatal(err)
			}
			if !strings.Contains(got.System, tt.want) || strings.Contains(got.System, tt.notWant) {
				t.Errorf("stance %s: got system %q, want it to contain %q and not %q", tt.stance, got.System, tt.want, tt.notWant)
			}
			if got.Prompt != "Greet the resident and ask what they think of the cable car plan so far." {
				t.Errorf("stance %s: got prompt %q, want the opening request", tt.stance, got.Prompt)
			}
		}
	})
	t.Run("OKCovariatesInPrompt", func(t *testing.T) {
		got, err := s.Render("tailored", respondent("67", "right", "unsure"))
		if err != nil {
			t.Fatal(err)
		}
		want := "resident who is 67 years old,\nleans right politically and whose current view of the cable car is: unsure."
		if !strings.Contains(got.Prompt, want) {
			t.Errorf("got %q, want it to contain %q", got.Prompt, want)
		}
	})
	t.Run("OKFixedArmRendersNothing", func(t *testing.T) {
		got, err := s.Render("notice", respondent("40", "left", "favour"))
		if err != nil || got.System != "" || got.Prompt != "" {
			t.Errorf("got %+v, %v, want empty prompts and no error", got, err)
		}
	})
	t.Run("ErrUnknownArm", func(t *testing.T) {
		if _, err := s.Render("lecture", respondent("40", "left", "favour")); err == nil {
			t.Errorf("got no error, want one for an arm the study lacks")
		}
	})
}

// TestRenderIntegerComparison checks that integer covariates reach templates
// as numbers. text/template's comparison functions (package docs, "Functions":
// eq, ne, lt, le, gt, ge) compare basic types of the same kind and refuse a
// string against an integer, so `gt .age 60` works only with a number, and
// as a number 100 > 60 where as text "100" < "60".
func TestRenderIntegerComparison(t *testing.T) {
	base := string(mustRead(t, filepath.Join(studiesDir, "minimal.yaml")))
	src := edit(t, base,
		"max: 99", "max: 120",
		"about the footbridge.", `about the footbridge.{{if gt .age 60}} Speak slowly.{{end}}`)
	s, err := Parse("older.yaml", []byte(src))
	if err != nil {
		t.Fatal(err)
	}
	tests := []struct {
		name, age string
		slowly    bool
	}{
		{"OKYounger", "35", false},
		{"OKBoundary", "60", false},
		{"OKOlder", "61", true},
		{"OKThreeDigits", "100", true},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			r, err := s.ParseEntry(url.Values{"rid": {"R1"}, "age": {tt.age}, "stance": {"favour"}})
			if err != nil {
				t.Fatal(err)
			}
			got, err := s.Render("talk", r)
			if err != nil {
				t.Fatal(err)
			}
			if has := strings.HasSuffix(got.System, "Speak slowly."); has != tt.slowly {
				t.Errorf("age %s: got %q, want the instruction to slow down: %v", tt.age, got.System, tt.slowly)
			}
		})
	}
	t.Run("ErrNotANumber", func(t *testing.T) {
		r := Respondent{RID: "R1", Covariates: map[string]string{"age": "old", "stance": "favour"}}
		if _, err := s.Render("talk", r); err == nil {
			t.Errorf("got no error, want one for an integer covariate that is no number")
		}
	})
}

// TestReturnURL checks that values reach the return address query-escaped
// as url.QueryEscape does (net/url docs; the application/x-www-form-urlencoded
// serializer of the WHATWG URL Standard), so none can add a parameter.
func TestReturnURL(t *testing.T) {
	s := mustParseFile(t, demoPath)
	t.Run("OK", func(t *testing.T) {
		got, err := s.ReturnURL("R-1", "ABCDE-FGHJK", "A4")
		if err != nil {
			t.Fatal(err)
		}
		want := "https://survey.example.org/resume?rid=R-1&code=ABCDE-FGHJK&arm=A4"
		if got != want {
			t.Errorf("got %q, want %q", got, want)
		}
	})
	t.Run("OKEscaped", func(t *testing.T) {
		got, err := s.ReturnURL("R:1@x", "C&D=E F", "A/1?#")
		if err != nil {
			t.Fatal(err)
		}
		want := "https://survey.example.org/resume?rid=R%3A1%40x&code=C%26D%3DE+F&arm=A%2F1%3F%23"
		if got != want {
			t.Errorf("got %q, want %q", got, want)
		}
		u, err := url.Parse(got)
		if err != nil {
			t.Fatal(err)
		}
		q := u.Query()
		if len(q) != 3 || q.Get("code") != "C&D=E F" || q.Get("arm") != "A/1?#" || q.Get("rid") != "R:1@x" {
			t.Errorf("got query %v, want exactly rid, code and arm with their values intact", q)
		}
	})
	t.Run("OKStudyField", func(t *testing.T) {
		st := *s
		st.Return = "https://survey.example.org/{{.study}}/done?c={{.code}}"
		got, err := st.ReturnURL("R1", "K", "A1")
		if err != nil || got != "https://survey.example.org/quillhaven-cable-car/done?c=K" {
			t.Errorf("got %q, %v, want the study id in the path", got, err)
		}
	})
	t.Run("ErrBadTemplate", func(t *testing.T) {
		st := *s
		st.Return = "https://survey.example.org/?c={{.code"
		if _, err := st.ReturnURL("R1", "K", "A1"); err == nil {
			t.Errorf("got no error, want one for a template that does not parse")
		}
	})
}
