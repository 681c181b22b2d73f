package arms

import (
	"bytes"
	"encoding/json"
	"fmt"
	"strconv"
	"strings"
	"text/template"

	"trialogue/arms/canon"
)

// Canonical returns the study's RFC 8785 canonical JSON form: reformatting
// the YAML or reordering its keys leaves it unchanged; any change of meaning
// changes it.
func (s *Study) Canonical() ([]byte, error) {
	b, err := canon.Marshal(s)
	if err != nil {
		return nil, fmt.Errorf("canonical form of study %q: %w", s.ID, err)
	}
	return b, nil
}

// Hash returns the lowercase hex SHA-256 of the canonical form, which
// identifies this version of the study.
func (s *Study) Hash() (string, error) {
	h, err := canon.SHA256(s)
	if err != nil {
		return "", fmt.Errorf("hash of study %q: %w", s.ID, err)
	}
	return h, nil
}

// FromCanonical rebuilds a study from its canonical form, as stored for a
// version: the exact meaning that was hashed, whatever file it came from.
func FromCanonical(b []byte) (*Study, error) {
	var s Study
	dec := json.NewDecoder(bytes.NewReader(b))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&s); err != nil {
		return nil, fmt.Errorf("study from canonical form: %w", err)
	}
	if len(s.ArmOrder) != len(s.Arms) {
		return nil, fmt.Errorf("study from canonical form: arm_order names %d arms, the study has %d", len(s.ArmOrder), len(s.Arms))
	}
	for _, name := range s.ArmOrder {
		if _, ok := s.Arms[name]; !ok {
			return nil, fmt.Errorf("study from canonical form: arm_order names %q, which is not an arm", name)
		}
	}
	return &s, nil
}

// Rendered is an arm's prompts for one respondent.
type Rendered struct {
	System string
	Prompt string // the request for a message arm's message or a chat's opening
}

// Render renders an arm's prompt templates for one respondent: covariates
// by name (integers as numbers), and the arm's variables as .vars.
func (s *Study) Render(armName string, r Respondent) (Rendered, error) {
	a, ok := s.Arms[armName]
	if !ok {
		return Rendered{}, fmt.Errorf("render: arm %q is not in study %q", armName, s.ID)
	}
	data := make(map[string]any, len(s.Covariates)+1)
	for _, c := range s.Covariates {
		val := r.Covariates[c.Name]
		if c.Type == TypeInteger && val != "" {
			n, err := strconv.Atoi(val)
			if err != nil {
				return Rendered{}, fmt.Errorf("render: covariate %q: %w", c.Name, err)
			}
			data[c.Name] = n
			continue
		}
		data[c.Name] = val
	}
	vars := make(map[string]string, len(a.Vars))
	for k, tmpl := range a.Vars {
		out, err := execute(armName+".vars."+k, tmpl, data)
		if err != nil {
			return Rendered{}, err
		}
		vars[k] = out
	}
	data["vars"] = vars
	var out Rendered
	var err error
	if out.System, err = execute(armName+".system", a.System, data); err != nil {
		return Rendered{}, err
	}
	if out.Prompt, err = execute(armName+".prompt", a.Prompt, data); err != nil {
		return Rendered{}, err
	}
	return out, nil
}

func execute(name, text string, data map[string]any) (string, error) {
	if text == "" {
		return "", nil
	}
	t, err := template.New(name).Option("missingkey=error").Parse(text)
	if err != nil {
		return "", fmt.Errorf("render %s: %w", name, err)
	}
	var b strings.Builder
	if err := t.Execute(&b, data); err != nil {
		return "", fmt.Errorf("render %s: %w", name, err)
	}
	return strings.TrimSpace(b.String()), nil
}
