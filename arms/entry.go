package arms

import (
	"fmt"
	"net/url"
	"regexp"
	"strconv"
	"strings"
	"unicode/utf8"
)

// MaxRIDLen bounds a respondent id.
const MaxRIDLen = 128

// ridPattern accepts the ids survey platforms generate: letters, digits and
// a few punctuation marks, no spaces.
var ridPattern = regexp.MustCompile(`^[A-Za-z0-9][A-Za-z0-9._:@~-]*$`)

// Respondent is who enters a study: the survey's respondent id and the
// covariates passed with it, validated.
type Respondent struct {
	RID        string
	Covariates map[string]string // by covariate name, as passed (integers in decimal)
	// Language is the page language chosen with lang= in the entry link,
	// one of the study's PageLanguages; "" means the study's language.
	Language string
}

// FieldError is a respondent-entry error naming the field at fault.
type FieldError struct {
	Field string
	Msg   string
}

func (e *FieldError) Error() string { return e.Field + ": " + e.Msg }

// ParseEntry validates an entry link's query: rid and the declared
// covariates. Parameters the study does not declare are ignored, since survey
// platforms append their own.
func (s *Study) ParseEntry(q url.Values) (Respondent, error) {
	r := Respondent{Covariates: map[string]string{}}
	rids := q["rid"]
	switch {
	case len(rids) == 0 || rids[0] == "":
		return r, &FieldError{"rid", "the respondent id is missing"}
	case len(rids) > 1:
		return r, &FieldError{"rid", "the respondent id is given more than once"}
	case len(rids[0]) > MaxRIDLen:
		return r, &FieldError{"rid", fmt.Sprintf("the respondent id is longer than %d characters", MaxRIDLen)}
	case !ridPattern.MatchString(rids[0]):
		return r, &FieldError{"rid", "the respondent id may contain only letters, digits and . _ : @ ~ -"}
	}
	r.RID = rids[0]
	lang, err := s.EntryLanguage(q["lang"])
	if err != nil {
		return r, err
	}
	r.Language = lang
	for _, c := range s.Covariates {
		vals := q[c.Name]
		if len(vals) > 1 {
			return r, &FieldError{c.Name, "given more than once"}
		}
		if len(vals) == 0 || vals[0] == "" {
			if c.Required {
				return r, &FieldError{c.Name, "this covariate is required"}
			}
			continue
		}
		val, err := c.Check(vals[0])
		if err != nil {
			return r, &FieldError{c.Name, err.Error()}
		}
		r.Covariates[c.Name] = val
	}
	return r, nil
}

// Check validates one value of the covariate and returns it in normal form.
func (c Covariate) Check(val string) (string, error) {
	if !utf8.ValidString(val) {
		return "", fmt.Errorf("not valid UTF-8 text")
	}
	switch c.Type {
	case TypeChoice:
		for _, allowed := range c.Values {
			if val == allowed {
				return val, nil
			}
		}
		return "", fmt.Errorf("%q is not one of %s", val, strings.Join(c.Values, ", "))
	case TypeInteger:
		n, err := strconv.Atoi(strings.TrimSpace(val))
		if err != nil {
			return "", fmt.Errorf("%q is not a whole number", val)
		}
		if c.Min != nil && n < *c.Min {
			return "", fmt.Errorf("%d is below the minimum %d", n, *c.Min)
		}
		if c.Max != nil && n > *c.Max {
			return "", fmt.Errorf("%d is above the maximum %d", n, *c.Max)
		}
		return strconv.Itoa(n), nil
	case TypeText:
		max := c.MaxLen
		if max == 0 {
			max = DefaultTextMaxLen
		}
		if utf8.RuneCountInString(val) > max {
			return "", fmt.Errorf("longer than %d characters", max)
		}
		for _, r := range val {
			if r < 0x20 || r == 0x7f {
				return "", fmt.Errorf("contains a control character")
			}
		}
		return val, nil
	}
	return "", fmt.Errorf("covariate type %q is unknown", c.Type)
}

// StratumKey names the respondent's stratum: the strata covariates in
// declared order, as name=value joined by "|"; "all" for an unstratified study.
func (s *Study) StratumKey(r Respondent) string {
	if len(s.Strata) == 0 {
		return "all"
	}
	parts := make([]string, len(s.Strata))
	for i, name := range s.Strata {
		parts[i] = name + "=" + r.Covariates[name]
	}
	return strings.Join(parts, "|")
}

// StrataKeys lists every stratum of the design, in declared value order.
func (s *Study) StrataKeys() []string {
	keys := []string{""}
	for _, name := range s.Strata {
		c, _ := s.Covariate(name)
		var next []string
		for _, k := range keys {
			for _, val := range c.Values {
				part := name + "=" + val
				if k != "" {
					part = k + "|" + part
				}
				next = append(next, part)
			}
		}
		keys = next
	}
	if len(s.Strata) == 0 {
		return []string{"all"}
	}
	return keys
}

// Example returns a made-up respondent with a valid value for every
// covariate, for `trialogue check` and the demo.
func (s *Study) Example() Respondent {
	r := Respondent{RID: "R-example", Covariates: map[string]string{}}
	for _, c := range s.Covariates {
		switch c.Type {
		case TypeChoice:
			r.Covariates[c.Name] = c.Values[0]
		case TypeInteger:
			n := 40
			if c.Min != nil && n < *c.Min {
				n = *c.Min
			}
			if c.Max != nil && n > *c.Max {
				n = *c.Max
			}
			r.Covariates[c.Name] = strconv.Itoa(n)
		case TypeText:
			r.Covariates[c.Name] = "example"
		}
	}
	return r
}

// EntryLanguage resolves the lang parameter of an entry link to one of the
// study's page languages. Survey platforms write language codes in their
// own case and often with a region (EN, es-MX), so case is ignored and a
// region the study does not offer falls back to its base language.
func (s *Study) EntryLanguage(vals []string) (string, error) {
	if len(vals) > 1 {
		return "", &FieldError{"lang", "given more than once"}
	}
	if len(vals) == 0 || vals[0] == "" {
		return "", nil
	}
	if len(vals[0]) > 35 {
		return "", &FieldError{"lang", "the language code is longer than 35 characters"}
	}
	want := strings.ReplaceAll(vals[0], "_", "-")
	offered := s.PageLanguages()
	for _, l := range offered {
		if strings.EqualFold(l, want) {
			return l, nil
		}
	}
	base, _, _ := strings.Cut(want, "-")
	for _, l := range offered {
		if strings.EqualFold(l, base) {
			return l, nil
		}
	}
	return "", &FieldError{"lang", fmt.Sprintf("%q is not a language of this study (%s)", vals[0], strings.Join(offered, ", "))}
}
