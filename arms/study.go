// Package arms is the experiment itself: the study file model, its parsing
// and validation, the canonical form behind version hashes, prompt rendering
// and the entry rules for respondents. It knows nothing of HTTP or SQL, so the
// science can be tested alone and reused from the command line.
package arms

import (
	"encoding/json"
	"fmt"
	"strings"
	"time"
)

// Arm kinds.
const (
	KindFixed   = "fixed"   // a fixed text, continue after a minimum reading time
	KindMessage = "message" // one model-written message, generated once and stored
	KindChat    = "chat"    // a capped conversation with the model
)

// Endpoint kinds.
const (
	EndpointOpenAI   = "openai"   // any OpenAI-compatible chat-completions service
	EndpointScripted = "scripted" // offline, deterministic replies from the study file
)

// Covariate types.
const (
	TypeChoice  = "choice"
	TypeInteger = "integer"
	TypeText    = "text"
)

// Study is one study file, parsed and validated. Its canonical JSON form
// (see Canonical) identifies a version of the study.
type Study struct {
	ID             string               `yaml:"id" json:"id"`
	Title          string               `yaml:"title" json:"title"`
	Language       string               `yaml:"language" json:"language"`
	Covariates     []Covariate          `yaml:"covariates" json:"covariates"`
	Strata         []string             `yaml:"strata" json:"strata"`
	Allocation     Allocation           `yaml:"allocation" json:"allocation"`
	Endpoints      map[string]*Endpoint `yaml:"endpoints" json:"endpoints"`
	Arms           map[string]*Arm      `yaml:"arms" json:"arms"`
	Return         string               `yaml:"return" json:"return"`
	FrameAncestors []string             `yaml:"frame_ancestors" json:"frame_ancestors"`
	// ParentOrigin is the origin the completion message is posted to when the
	// respondent page runs inside a survey's iframe; "*" when empty.
	ParentOrigin string `yaml:"parent_origin" json:"parent_origin"`
	// Texts are respondent-facing strings that override the catalogue of
	// the study's language (intro, disclosure, closing, buttons, errors).
	Texts map[string]string `yaml:"texts" json:"texts"`
	// Languages are further languages that an entry link may choose with
	// lang= (the study's Language is always allowed). They change the
	// page's own strings, not the arms' texts or prompts.
	Languages []string `yaml:"languages" json:"languages,omitempty"`
	// Translations override catalogue strings per language, by language
	// code: for a study offering several languages, what Texts is for Language.
	Translations map[string]map[string]string `yaml:"translations" json:"translations,omitempty"`
	// Fielding is how the study is run with people: pilot size, protocol
	// texts, dropout, closing grace and model prices (see Fielding).
	Fielding *Fielding `yaml:"fielding" json:"fielding,omitempty"`
	// Probes are fixed conversations replayed against the arms' endpoints
	// to detect a change of model behaviour (trialogue drift).
	Probes []Probe `yaml:"probes" json:"probes,omitempty"`
	// Drift tunes the drift check; defaults apply where it is absent.
	Drift *DriftSettings `yaml:"drift" json:"drift,omitempty"`
	// Flags tunes the transcript flags (trialogue/arms/flags); defaults
	// apply where it is absent.
	Flags *FlagSettings `yaml:"flags" json:"flags,omitempty"`

	// ArmOrder is the order in which arms are declared in the file,
	// recovered from the YAML. It is part of the canonical form: the
	// allocation sequence and the default arm codes follow it.
	ArmOrder []string `yaml:"-" json:"arm_order"`
}

// Probe is a fixed respondent: a profile of covariates and the replies it
// gives, played against some or all model arms.
type Probe struct {
	Name       string            `yaml:"name" json:"name"`
	Arms       []string          `yaml:"arms" json:"arms,omitempty"` // default: every message and chat arm
	Covariates map[string]Scalar `yaml:"covariates" json:"covariates"`
	Replies    []string          `yaml:"replies" json:"replies,omitempty"`
}

// DriftSettings are how often probes are played and when a difference
// warns or fails (see trialogue/arms/drift for their meaning).
type DriftSettings struct {
	Runs           int      `yaml:"runs" json:"runs,omitempty"` // default 5
	ExactWarn      *float64 `yaml:"exact_warn" json:"exact_warn,omitempty"`
	ExactFail      *float64 `yaml:"exact_fail" json:"exact_fail,omitempty"`
	SimilarityWarn *float64 `yaml:"similarity_warn" json:"similarity_warn,omitempty"`
	SimilarityFail *float64 `yaml:"similarity_fail" json:"similarity_fail,omitempty"`
	KSWarn         *float64 `yaml:"ks_warn" json:"ks_warn,omitempty"`
	KSFail         *float64 `yaml:"ks_fail" json:"ks_fail,omitempty"`
}

// FlagSettings tune the transcript flags; see trialogue/arms/flags for
// their meaning and defaults.
type FlagSettings struct {
	// Concede lists the phrases with which the model gives up its side;
	// when set, it replaces the default phrases.
	Concede []string `yaml:"concede" json:"concede,omitempty"`
	// Argue lists the arms in which the model argues an assigned side;
	// default every chat arm.
	Argue []string `yaml:"argue" json:"argue,omitempty"`
	// Reveal lists the covariates the model must not repeat back; default
	// every covariate.
	Reveal []string `yaml:"reveal" json:"reveal,omitempty"`
	// ShortWords: a reply under this many words is short; default 4.
	ShortWords int `yaml:"short_words" json:"short_words,omitempty"`
	// TimeLimit: a session longer than this is flagged; default 30m.
	TimeLimit Duration `yaml:"time_limit" json:"time_limit,omitempty"`
}

// Scalar is a YAML scalar read as text, so that a probe may write age: 52.
type Scalar string

// UnmarshalYAML reads any scalar as its text.
func (s *Scalar) UnmarshalYAML(b []byte) error {
	v := strings.TrimSpace(string(b))
	if strings.HasPrefix(v, "[") || strings.HasPrefix(v, "{") || strings.Contains(v, "\n") {
		return fmt.Errorf("expected a single value, got %q", v)
	}
	if len(v) >= 2 && (v[0] == '"' || v[0] == '\'') && v[len(v)-1] == v[0] {
		v = v[1 : len(v)-1]
	}
	*s = Scalar(v)
	return nil
}

// Covariate is a pre-treatment variable that the survey passes in the entry link.
type Covariate struct {
	Name     string   `yaml:"name" json:"name"`
	Type     string   `yaml:"type" json:"type"`
	Values   []string `yaml:"values" json:"values,omitempty"` // choice: the allowed values
	Min      *int     `yaml:"min" json:"min,omitempty"`       // integer: inclusive bounds
	Max      *int     `yaml:"max" json:"max,omitempty"`
	MaxLen   int      `yaml:"max_len" json:"max_len,omitempty"` // text: in characters, default 200
	Required bool     `yaml:"required" json:"required"`
}

// Allocation is the randomization scheme: arms with their ratios and the
// block sizes to draw from within each stratum.
type Allocation struct {
	Blocks []int          `yaml:"blocks" json:"blocks"`
	Arms   map[string]int `yaml:"arms" json:"arms"`
}

// Endpoint is a named model service.
type Endpoint struct {
	Kind        string   `yaml:"kind" json:"kind"`
	BaseURL     string   `yaml:"base_url" json:"base_url,omitempty"`
	Model       string   `yaml:"model" json:"model,omitempty"`
	APIKeyEnv   string   `yaml:"api_key_env" json:"api_key_env,omitempty"` // name of the variable, never the key
	Temperature *float64 `yaml:"temperature" json:"temperature,omitempty"`
	TopP        *float64 `yaml:"top_p" json:"top_p,omitempty"`
	MaxTokens   int      `yaml:"max_tokens" json:"max_tokens,omitempty"`
	Seed        *int     `yaml:"seed" json:"seed,omitempty"`
	Timeout     Duration `yaml:"timeout" json:"timeout,omitempty"`   // per attempt; default 60s
	Attempts    int      `yaml:"attempts" json:"attempts,omitempty"` // default 4
	// Scripted endpoints: how each reply is streamed.
	Chunks int      `yaml:"chunks" json:"chunks,omitempty"`
	Delay  Duration `yaml:"delay" json:"delay,omitempty"` // total per reply
}

// Arm is one treatment or control condition.
type Arm struct {
	Kind string `yaml:"kind" json:"kind"`
	// Code is the neutral label sent back to the survey (A1, A2, ... in
	// declaration order unless set).
	Code       string `yaml:"code" json:"code"`
	Text       string `yaml:"text" json:"text,omitempty"`               // fixed
	MinSeconds int    `yaml:"min_seconds" json:"min_seconds,omitempty"` // fixed, message: reading time before Continue
	Endpoint   string `yaml:"endpoint" json:"endpoint,omitempty"`
	// System is the system prompt template (text/template over covariates and .vars).
	System string `yaml:"system" json:"system,omitempty"`
	// Prompt is the instruction that asks for a message arm's message, or
	// for a chat arm's opening message when Opening is set.
	Prompt  string            `yaml:"prompt" json:"prompt,omitempty"`
	Opening bool              `yaml:"opening" json:"opening,omitempty"` // chat: the model writes first
	Replies *Replies          `yaml:"replies" json:"replies,omitempty"`
	Vars    map[string]string `yaml:"vars" json:"vars,omitempty"`
	// Script lists the replies a scripted endpoint gives for this arm, in order.
	Script []string `yaml:"script" json:"script,omitempty"`
}

// Replies are the limits of a chat arm's conversation.
type Replies struct {
	Min      int `yaml:"min" json:"min"`
	Max      int `yaml:"max" json:"max"`
	MinWords int `yaml:"min_words" json:"min_words,omitempty"`
	MaxChars int `yaml:"max_chars" json:"max_chars"` // default 1500
}

// Duration is a time span written in the study file as "2s" or "500ms".
type Duration time.Duration

// UnmarshalYAML reads a duration string such as "1.5s".
func (d *Duration) UnmarshalYAML(b []byte) error {
	s := strings.Trim(strings.TrimSpace(string(b)), `"'`)
	v, err := time.ParseDuration(s)
	if err != nil {
		return fmt.Errorf("%q is not a duration (write it like 2s or 500ms)", s)
	}
	if v < 0 {
		return fmt.Errorf("duration %q is negative", s)
	}
	*d = Duration(v)
	return nil
}

// MarshalJSON writes the duration in Go's notation ("2s"), so the canonical
// form stays readable.
func (d Duration) MarshalJSON() ([]byte, error) {
	return json.Marshal(time.Duration(d).String())
}

// UnmarshalJSON reads what MarshalJSON wrote.
func (d *Duration) UnmarshalJSON(b []byte) error {
	var s string
	if err := json.Unmarshal(b, &s); err != nil {
		return fmt.Errorf("duration: %w", err)
	}
	v, err := time.ParseDuration(s)
	if err != nil {
		return fmt.Errorf("duration: %w", err)
	}
	*d = Duration(v)
	return nil
}

// IsZero reports whether the duration is unset, so omitempty leaves it out.
func (d Duration) IsZero() bool { return d == 0 }

// Covariate returns the covariate called name.
func (s *Study) Covariate(name string) (Covariate, bool) {
	for _, c := range s.Covariates {
		if c.Name == name {
			return c, true
		}
	}
	return Covariate{}, false
}

// ArmByCode returns the name of the arm whose code is code.
func (s *Study) ArmByCode(code string) (string, bool) {
	for name, a := range s.Arms {
		if a.Code == code {
			return name, true
		}
	}
	return "", false
}

// RepliesOf returns an arm's reply limits; zero limits for arms that are not chats.
func (a *Arm) RepliesOf() Replies {
	if a.Replies == nil {
		return Replies{}
	}
	return *a.Replies
}

// NeedsModel reports whether the arm has the model write any turn.
func (a *Arm) NeedsModel() bool {
	return a.Kind == KindMessage || a.Kind == KindChat
}

// TextOverrides returns the study's overrides of the page's strings for a
// respondent whose page is in lang: Texts for the study's language, then
// that language's Translations.
func (s *Study) TextOverrides(lang string) map[string]string {
	out := map[string]string{}
	if lang == "" || lang == s.Language {
		for k, v := range s.Texts {
			out[k] = v
		}
		lang = s.Language
	}
	for k, v := range s.Translations[lang] {
		out[k] = v
	}
	return out
}

// PageLanguages lists the languages a respondent's page may be in: the
// study's language first, then the further Languages.
func (s *Study) PageLanguages() []string {
	out := []string{s.Language}
	for _, l := range s.Languages {
		if l != s.Language {
			out = append(out, l)
		}
	}
	return out
}
