package arms

import (
	"errors"
	"maps"
	"net/url"
	"slices"
	"strings"
	"testing"
)

func TestParseEntry(t *testing.T) {
	s := mustParseFile(t, demoPath)
	const good = "rid=R_7.a:b@c~d-e&age=42&lean=centre&stance=against"
	tests := []struct {
		name  string
		query string
		field string            // the FieldError's field; "" when the entry is valid
		want  map[string]string // the covariates of a valid entry
	}{
		{"OK", good, "", map[string]string{"age": "42", "lean": "centre", "stance": "against"}},
		{"OKOptionalText", good + "&district=Mill+Quarter", "", map[string]string{"age": "42", "lean": "centre", "stance": "against", "district": "Mill Quarter"}},
		{"OKUnknownParamsIgnored", good + "&utm_source=panel&rid_hash=x&Lean=right", "", map[string]string{"age": "42", "lean": "centre", "stance": "against"}},
		{"OKIntegerNormalized", "rid=R1&age=%2B042&lean=left&stance=favour", "", map[string]string{"age": "42", "lean": "left", "stance": "favour"}},
		{"OKEmptyOptional", good + "&district=", "", map[string]string{"age": "42", "lean": "centre", "stance": "against"}},
		{"OKIntegerBounds", "rid=R1&age=18&lean=left&stance=favour", "", map[string]string{"age": "18", "lean": "left", "stance": "favour"}},
		{"ErrMissingRid", "age=42&lean=centre&stance=against", "rid", nil},
		{"ErrEmptyRid", "rid=&age=42&lean=centre&stance=against", "rid", nil},
		{"ErrRidTooLong", "rid=" + strings.Repeat("r", MaxRIDLen+1) + "&age=42&lean=left&stance=favour", "rid", nil},
		{"ErrRidWithSpace", "rid=R+1&age=42&lean=left&stance=favour", "rid", nil},
		{"ErrRidWithAngle", "rid=R%3Cb%3E&age=42&lean=left&stance=favour", "rid", nil},
		{"ErrRidWithAmpersand", "rid=R%261&age=42&lean=left&stance=favour", "rid", nil},
		{"ErrRidStartsWithPunctuation", "rid=-R1&age=42&lean=left&stance=favour", "rid", nil},
		{"ErrRidRepeated", "rid=R1&rid=R2&age=42&lean=left&stance=favour", "rid", nil},
		{"ErrMissingRequired", "rid=R1&age=42&stance=favour", "lean", nil},
		{"ErrEmptyRequired", "rid=R1&age=&lean=left&stance=favour", "age", nil},
		{"ErrCovariateRepeated", "rid=R1&age=42&lean=left&lean=right&stance=favour", "lean", nil},
		{"ErrChoiceOutsideList", "rid=R1&age=42&lean=Left&stance=favour", "lean", nil},
		{"ErrIntegerBelowMin", "rid=R1&age=17&lean=left&stance=favour", "age", nil},
		{"ErrIntegerAboveMax", "rid=R1&age=100&lean=left&stance=favour", "age", nil},
		{"ErrIntegerNotANumber", "rid=R1&age=forty&lean=left&stance=favour", "age", nil},
		{"ErrIntegerFraction", "rid=R1&age=42.5&lean=left&stance=favour", "age", nil},
		{"ErrTextTooLong", good + "&district=" + strings.Repeat("x", 61), "district", nil},
		{"ErrTextControlChar", good + "&district=Mill%0AQuarter", "district", nil},
		{"ErrTextDelete", good + "&district=Mill%7FQuarter", "district", nil},
		{"ErrTextInvalidUTF8", good + "&district=Mill%FFQuarter", "district", nil},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			q, err := url.ParseQuery(tt.query)
			if err != nil {
				t.Fatal(err)
			}
			r, err := s.ParseEntry(q)
			if tt.field == "" {
				if err != nil {
					t.Fatalf("got %v, want no error", err)
				}
				if r.RID != q.Get("rid") {
					t.Errorf("RID: got %q, want %q", r.RID, q.Get("rid"))
				}
				if !maps.Equal(r.Covariates, tt.want) {
					t.Errorf("Covariates: got %v, want %v", r.Covariates, tt.want)
				}
				return
			}
			var fe *FieldError
			if !errors.As(err, &fe) {
				t.Fatalf("got %v, want a *FieldError for %s", err, tt.field)
			}
			if fe.Field != tt.field {
				t.Errorf("Field: got %q, want %q (%v)", fe.Field, tt.field, err)
			}
			if !strings.HasPrefix(fe.Error(), tt.field+": ") || fe.Msg == "" {
				t.Errorf("Error(): got %q, want %q followed by a message", fe.Error(), tt.field+": ")
			}
		})
	}
}

func TestParseEntryRidMaxLen(t *testing.T) {
	s := mustParseFile(t, demoPath)
	q := url.Values{"rid": {strings.Repeat("r", MaxRIDLen)}, "age": {"30"}, "lean": {"right"}, "stance": {"unsure"}}
	r, err := s.ParseEntry(q)
	if err != nil || len(r.RID) != MaxRIDLen {
		t.Errorf("got %d characters, %v, want %d characters and no error", len(r.RID), err, MaxRIDLen)
	}
}

func TestStrata(t *testing.T) {
	s := mustParseFile(t, demoPath)

	t.Run("OKStrataKeys", func(t *testing.T) {
		got := s.StrataKeys()
		wantKeys := []string{"lean=left", "lean=centre", "lean=right"}
		if !slices.Equal(got, wantKeys) {
			t.Errorf("got %v, want %v", got, wantKeys)
		}
	})
	t.Run("OKStratumKey", func(t *testing.T) {
		r := Respondent{RID: "R1", Covariates: map[string]string{"age": "50", "lean": "right", "stance": "favour"}}
		if got := s.StratumKey(r); got != "lean=right" {
			t.Errorf("got %q, want lean=right", got)
		}
		if !slices.Contains(s.StrataKeys(), s.StratumKey(r)) {
			t.Errorf("StratumKey %q is not among StrataKeys %v", s.StratumKey(r), s.StrataKeys())
		}
	})
	t.Run("OKTwoStrata", func(t *testing.T) {
		two := *s
		two.Strata = []string{"lean", "stance"}
		keys := two.StrataKeys()
		if len(keys) != 9 || keys[0] != "lean=left|stance=favour" || keys[8] != "lean=right|stance=unsure" {
			t.Errorf("got %v, want 9 keys from lean=left|stance=favour to lean=right|stance=unsure", keys)
		}
		r := Respondent{Covariates: map[string]string{"lean": "centre", "stance": "against"}}
		if got := two.StratumKey(r); got != "lean=centre|stance=against" {
			t.Errorf("got %q, want lean=centre|stance=against", got)
		}
	})
	t.Run("OKUnstratified", func(t *testing.T) {
		none := *s
		none.Strata = nil
		if got := none.StrataKeys(); !slices.Equal(got, []string{"all"}) {
			t.Errorf("StrataKeys: got %v, want [all]", got)
		}
		if got := none.StratumKey(Respondent{}); got != "all" {
			t.Errorf("StratumKey: got %q, want all", got)
		}
	})
}

func TestExample(t *testing.T) {
	for _, path := range []string{demoPath, studiesDir + "/minimal.yaml"} {
		s := mustParseFile(t, path)
		ex := s.Example()
		q := url.Values{"rid": {ex.RID}}
		for k, v := range ex.Covariates {
			q.Set(k, v)
		}
		r, err := s.ParseEntry(q)
		if err != nil {
			t.Fatalf("%s: got %v, want the example respondent to pass ParseEntry", path, err)
		}
		if !maps.Equal(r.Covariates, ex.Covariates) {
			t.Errorf("%s: got %v, want %v", path, r.Covariates, ex.Covariates)
		}
		if !slices.Contains(s.StrataKeys(), s.StratumKey(r)) {
			t.Errorf("%s: stratum %q is not among %v", path, s.StratumKey(r), s.StrataKeys())
		}
	}
}

func TestCovariateCheckUnknownType(t *testing.T) {
	_, err := Covariate{Name: "x", Type: "colour"}.Check("red")
	if err == nil || !strings.Contains(err.Error(), `"colour" is unknown`) {
		t.Errorf("got %v, want an error naming the unknown type", err)
	}
}
