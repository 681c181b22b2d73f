package simulate

import (
	"errors"
	"fmt"
	"math/rand/v2"
	"os"
	"strconv"
	"strings"

	"github.com/goccy/go-yaml"

	"trialogue/arms"
)

// PersonaFile is a personas file: who the synthetic respondents are.
//
//	personas:
//	  - name: cautious-retiree
//	    weight: 2
//	    describe: Retired ferry pilot who worries about costs.
//	    covariates:
//	      age: {min: 60, max: 85}
//	      lean: {values: [left, centre, right], weights: [1, 2, 1]}
//	      stance: {value: against}
//	    replies: ["I worry about what it costs the town.", "..."]
type PersonaFile struct {
	Personas []Persona `yaml:"personas"`
}

// Persona is one kind of synthetic respondent.
type Persona struct {
	Name       string          `yaml:"name"`
	Weight     float64         `yaml:"weight"`   // relative share of respondents (default 1)
	Describe   string          `yaml:"describe"` // for a model playing the persona: who they are
	Covariates map[string]Dist `yaml:"covariates"`
	Replies    []string        `yaml:"replies"` // sent in order, cycling; unused when a model plays the persona
}

// Dist is how one covariate's value is drawn: a fixed value, one of values
// (with optional weights), or an integer between min and max inclusive.
type Dist struct {
	Value   string    `yaml:"value"`
	Values  []string  `yaml:"values"`
	Weights []float64 `yaml:"weights"`
	Min     *int      `yaml:"min"`
	Max     *int      `yaml:"max"`
}

// LoadPersonas reads and checks a personas file. needReplies requires each
// persona to have replies, as it must unless a model plays the personas.
func LoadPersonas(path string, needReplies bool) ([]Persona, error) {
	b, err := os.ReadFile(path)
	if err != nil {
		return nil, fmt.Errorf("personas: %w", err)
	}
	return ParsePersonas(path, b, needReplies)
}

// ParsePersonas reads and checks the personas file named name.
func ParsePersonas(name string, b []byte, needReplies bool) ([]Persona, error) {
	var f PersonaFile
	if err := yaml.UnmarshalWithOptions(b, &f, yaml.Strict()); err != nil {
		return nil, fmt.Errorf("personas %s: %w", name, err)
	}
	if err := Check(f.Personas, needReplies); err != nil {
		return nil, fmt.Errorf("personas %s: %w", name, err)
	}
	return f.Personas, nil
}

// Check reports every mistake in a list of personas. needReplies requires
// each persona to have replies (when no model plays them).
func Check(ps []Persona, needReplies bool) error {
	if len(ps) == 0 {
		return errors.New("no personas: give at least one under personas:")
	}
	var errs []error
	seen := map[string]bool{}
	for i, p := range ps {
		at := fmt.Sprintf("persona %d (%s)", i+1, p.Name)
		if p.Name == "" {
			errs = append(errs, fmt.Errorf("persona %d: a name is required", i+1))
		} else if seen[p.Name] {
			errs = append(errs, fmt.Errorf("%s: the name is used twice", at))
		}
		seen[p.Name] = true
		if p.Weight < 0 {
			errs = append(errs, fmt.Errorf("%s: weight %v is negative", at, p.Weight))
		}
		if needReplies && len(p.Replies) == 0 {
			errs = append(errs, fmt.Errorf("%s: replies are required unless a model plays the persona (--persona-endpoint)", at))
		}
		for name, d := range p.Covariates {
			if err := d.check(); err != nil {
				errs = append(errs, fmt.Errorf("%s: covariate %s: %w", at, name, err))
			}
		}
	}
	return errors.Join(errs...)
}

func (d Dist) check() error {
	forms := 0
	if d.Value != "" {
		forms++
	}
	if len(d.Values) > 0 {
		forms++
	}
	if d.Min != nil || d.Max != nil {
		forms++
		if d.Min == nil || d.Max == nil {
			return errors.New("min and max go together")
		}
		if *d.Min > *d.Max {
			return fmt.Errorf("min %d is greater than max %d", *d.Min, *d.Max)
		}
	}
	if forms != 1 {
		return errors.New("give exactly one of value, values or min and max")
	}
	if len(d.Weights) > 0 {
		if len(d.Weights) != len(d.Values) {
			return fmt.Errorf("%d weights for %d values", len(d.Weights), len(d.Values))
		}
		sum := 0.0
		for _, w := range d.Weights {
			if w < 0 {
				return fmt.Errorf("weight %v is negative", w)
			}
			sum += w
		}
		if sum == 0 {
			return errors.New("the weights add up to zero")
		}
	}
	return nil
}

// draw picks a value.
func (d Dist) draw(rng *rand.Rand) string {
	switch {
	case d.Value != "":
		return d.Value
	case len(d.Values) > 0:
		if len(d.Weights) == 0 {
			return d.Values[rng.IntN(len(d.Values))]
		}
		return d.Values[pick(rng, d.Weights)]
	default:
		return strconv.Itoa(*d.Min + rng.IntN(*d.Max-*d.Min+1))
	}
}

// pick draws an index in proportion to weights (not all zero).
func pick(rng *rand.Rand, weights []float64) int {
	sum := 0.0
	for _, w := range weights {
		sum += w
	}
	x := rng.Float64() * sum
	for i, w := range weights {
		if x < w {
			return i
		}
		x -= w
	}
	return len(weights) - 1
}

// FromStudy makes one persona from a study's covariates: each choice drawn
// uniformly, each integer uniformly between its bounds, text left out, and
// short neutral replies.
func FromStudy(def *arms.Study) []Persona {
	p := Persona{Name: "uniform", Weight: 1, Covariates: map[string]Dist{},
		Replies: []string{
			"I have not made up my mind about this yet.",
			"That is a fair point, but what about the cost?",
			"I see it differently, to be honest with you.",
			"Could you tell me more about who would benefit?",
			"Thank you, that gives me something to think about.",
			"I think I understand the main arguments now.",
		}}
	for _, c := range def.Covariates {
		switch c.Type {
		case arms.TypeChoice:
			p.Covariates[c.Name] = Dist{Values: c.Values}
		case arms.TypeInteger:
			lo, hi := 18, 90
			if c.Min != nil {
				lo = *c.Min
			}
			if c.Max != nil {
				hi = *c.Max
			}
			if lo > hi {
				hi = lo
			}
			p.Covariates[c.Name] = Dist{Min: &lo, Max: &hi}
		}
	}
	return []Persona{p}
}

// describe is a persona's covariates and description, for a model playing it.
func describe(p Persona, covs map[string]string, names []string) string {
	var b strings.Builder
	b.WriteString("You are a respondent in an online survey, talking in a chat window. Stay in character and never say you are an AI.\n")
	if p.Describe != "" {
		b.WriteString("Who you are: " + p.Describe + "\n")
	}
	if len(names) > 0 {
		b.WriteString("Your answers to the survey so far:\n")
		for _, n := range names {
			fmt.Fprintf(&b, "- %s: %s\n", n, covs[n])
		}
	}
	b.WriteString("Answer the last message in one to three plain sentences, as this person would.")
	return b.String()
}
