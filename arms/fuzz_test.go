package arms

import (
	"errors"
	"net/url"
	"os"
	"path/filepath"
	"slices"
	"testing"
)

// FuzzParse feeds study files, valid and broken, to Parse. It must never
// panic; a failure is a *Problems with positions, sorted by line; a study it
// accepts has a canonical form, and parsing the same bytes again gives the
// same version hash, as does the study rebuilt from that canonical form.
// The seed corpus is in testdata/fuzz/FuzzParse and adds
// every fixture of testdata/studies.
func FuzzParse(f *testing.F) {
	paths, _ := filepath.Glob(filepath.Join(studiesDir, "*.yaml"))
	for _, p := range append(paths, demoPath) {
		if b, err := os.ReadFile(p); err == nil {
			f.Add(b)
		}
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		s, err := Parse("fuzz.yaml", data)
		if err != nil {
			if s != nil {
				t.Fatalf("got a study and an error %v, want one of them", err)
			}
			var ps *Problems
			if !errors.As(err, &ps) || len(ps.List) == 0 {
				t.Fatalf("got error %v (%T), want *Problems with at least one problem", err, err)
			}
			for i, q := range ps.List {
				if q.Line < 1 || q.Col < 1 {
					t.Errorf("problem %d: got position %d:%d, want both at least 1", i, q.Line, q.Col)
				}
				if i > 0 && (q.Line < ps.List[i-1].Line || q.Line == ps.List[i-1].Line && q.Col < ps.List[i-1].Col) {
					t.Errorf("problem %d at %d:%d comes after %d:%d, want sorted", i, q.Line, q.Col, ps.List[i-1].Line, ps.List[i-1].Col)
				}
			}
			return
		}
		c, err := s.Canonical()
		if err != nil || len(c) == 0 {
			t.Fatalf("Canonical: got %q, %v, want a canonical form of an accepted study", c, err)
		}
		h1, err := s.Hash()
		if err != nil {
			t.Fatalf("Hash: got %v, want none", err)
		}
		again, err := Parse("fuzz.yaml", data)
		if err != nil {
			t.Fatalf("second Parse: got %v, want the same success", err)
		}
		if h2, err := again.Hash(); err != nil || h2 != h1 {
			t.Fatalf("second Hash: got %s, %v, want %s", h2, err, h1)
		}
		// the stored form of a version rebuilds the same version
		back, err := FromCanonical(c)
		if err != nil {
			t.Fatalf("FromCanonical: got %v, want the study back", err)
		}
		if h3, err := back.Hash(); err != nil || h3 != h1 {
			t.Fatalf("hash after FromCanonical: got %s, %v, want %s", h3, err, h1)
		}
		// every arm is in the order, with a code of its own
		if len(s.ArmOrder) != len(s.Arms) {
			t.Fatalf("ArmOrder %v: got %d names, want the %d arms", s.ArmOrder, len(s.ArmOrder), len(s.Arms))
		}
		codes := map[string]bool{}
		for _, name := range s.ArmOrder {
			a := s.Arms[name]
			if a == nil || a.Code == "" || codes[a.Code] {
				t.Fatalf("arm %q: got %+v, want a declared arm with a unique code", name, a)
			}
			codes[a.Code] = true
		}
		// the example respondent enters and is placed in a stratum
		ex := s.Example()
		q := url.Values{"rid": {ex.RID}}
		for k, v := range ex.Covariates {
			q.Set(k, v)
		}
		r, err := s.ParseEntry(q)
		if err != nil {
			t.Fatalf("example respondent: got %v, want entry", err)
		}
		if !slices.Contains(s.StrataKeys(), s.StratumKey(r)) {
			t.Fatalf("stratum %q: not among %v", s.StratumKey(r), s.StrataKeys())
		}
		if _, err := s.ReturnURL(r.RID, "ABCDE-FGHJK", "A1"); err != nil {
			t.Fatalf("ReturnURL: got %v, want none for an accepted study", err)
		}
	})
}

// FuzzParseEntry feeds raw entry-link queries to the demo study's ParseEntry.
// It must never panic; an accepted respondent has a valid rid and only
// declared covariates, each valid, with every required one present.
func FuzzParseEntry(f *testing.F) {
	s := mustParseFile(f, demoPath)
	for _, q := range []string{
		"rid=R1&age=42&lean=centre&stance=against",
		"rid=R1&age=42&lean=centre&stance=against&district=Mill+Quarter&utm=x",
		"rid=R1&rid=R2&age=42&lean=left&stance=favour",
		"rid=R%3C1&age=%2B042&lean=left&stance=favour",
		"rid=R1&age=17&lean=left&stance=favour&district=%FF",
		"rid=R1;age=42&lean=left&stance=favour",
		"%zz&rid=R1",
		"",
	} {
		f.Add(q)
	}
	f.Fuzz(func(t *testing.T, raw string) {
		q, _ := url.ParseQuery(raw) // keeps what parsed, as net/http's Request.FormValue does
		r, err := s.ParseEntry(q)
		if err != nil {
			var fe *FieldError
			if !errors.As(err, &fe) || fe.Field == "" {
				t.Fatalf("got error %v (%T), want a *FieldError naming a field", err, err)
			}
			if _, ok := s.Covariate(fe.Field); !ok && fe.Field != "rid" {
				t.Fatalf("FieldError.Field: got %q, want rid or a declared covariate", fe.Field)
			}
			return
		}
		if len(r.RID) == 0 || len(r.RID) > MaxRIDLen || !ridPattern.MatchString(r.RID) {
			t.Fatalf("RID: got %q, want 1 to %d characters matching %s", r.RID, MaxRIDLen, ridPattern)
		}
		for name, val := range r.Covariates {
			c, ok := s.Covariate(name)
			if !ok {
				t.Fatalf("covariate %q: got it, want only declared covariates", name)
			}
			if norm, err := c.Check(val); err != nil || norm != val {
				t.Fatalf("covariate %s=%q: Check gives %q, %v, want the value back unchanged", name, val, norm, err)
			}
		}
		for _, c := range s.Covariates {
			if _, ok := r.Covariates[c.Name]; c.Required && !ok {
				t.Fatalf("required covariate %q: missing from an accepted respondent", c.Name)
			}
		}
		if !slices.Contains(s.StrataKeys(), s.StratumKey(r)) {
			t.Fatalf("stratum %q: not among %v", s.StratumKey(r), s.StrataKeys())
		}
	})
}
