package arms

import (
	"encoding/json"
	"fmt"
	"math"
	"reflect"
	"regexp"
	"slices"
	"strings"
	"time"
)

// Fielding is how a study is run with people, beyond the conversation
// itself: the size of a pilot, what the go-live checklist asks of the
// protocol, when an unfinished session counts as dropped, how long sessions
// under way may finish after closing, and model prices for the cost
// estimate. It is part of the version, like everything in the file.
type Fielding struct {
	// PilotCap bounds the respondents of one pilot round; default 50.
	PilotCap int `yaml:"pilot_cap" json:"pilot_cap,omitempty"`
	// PilotReviews is how many pilot transcripts of a version must be marked
	// reviewed before it may go live; default 5, at most PilotCap.
	PilotReviews int `yaml:"pilot_reviews" json:"pilot_reviews,omitempty"`
	// Consent is the informed-consent text respondents agreed to (shown by
	// the survey; kept here as the record of what they were told).
	Consent string `yaml:"consent" json:"consent,omitempty"`
	// Debriefing is what respondents are told after taking part.
	Debriefing string `yaml:"debriefing" json:"debriefing,omitempty"`
	// AIDisclosure records how respondents learn that an AI model writes the
	// replies: DisclosurePage or DisclosureDebriefing.
	AIDisclosure string `yaml:"ai_disclosure" json:"ai_disclosure,omitempty"`
	// DropoutAfter is the inactivity after which an unfinished session
	// counts as dropped; default 30m.
	DropoutAfter Duration `yaml:"dropout_after" json:"dropout_after,omitempty"`
	// CloseGrace is how long sessions under way may go on after the study
	// closes; default 1h, 0s for none.
	CloseGrace *Duration `yaml:"close_grace" json:"close_grace,omitempty"`
	// Prices are per endpoint name, per 1,000 tokens.
	Prices map[string]Price `yaml:"prices" json:"prices,omitempty"`
	// Currency names the prices' currency (ISO 4217 code, such as EUR).
	Currency string `yaml:"currency" json:"currency,omitempty"`
}

// Price is what an endpoint charges per 1,000 tokens.
type Price struct {
	Input  float64 `yaml:"input" json:"input"`
	Output float64 `yaml:"output" json:"output"`
}

// Ways of disclosing to respondents that an AI model writes the replies.
const (
	// DisclosurePage: the respondent page says so before and during the
	// conversation (its disclosure text).
	DisclosurePage = "page"
	// DisclosureDebriefing: respondents learn it in the debriefing, which
	// the ethics board must have approved.
	DisclosureDebriefing = "debriefing"
)

// Defaults of the fielding block.
const (
	DefaultPilotCap     = 50
	DefaultPilotReviews = 5
	DefaultDropoutAfter = 30 * time.Minute
	DefaultCloseGrace   = time.Hour
	maxFieldingText     = 20000
)

var currencyPattern = regexp.MustCompile(`^[A-Z]{3}$`)

// fieldingOf returns the block, empty when the file has none.
func (s *Study) fieldingOf() Fielding {
	if s.Fielding == nil {
		return Fielding{}
	}
	return *s.Fielding
}

// PilotCap is how many respondents one pilot round takes.
func (s *Study) PilotCap() int {
	if n := s.fieldingOf().PilotCap; n > 0 {
		return n
	}
	return DefaultPilotCap
}

// PilotReviews is how many reviewed pilot transcripts going live needs.
func (s *Study) PilotReviews() int {
	if n := s.fieldingOf().PilotReviews; n > 0 {
		return n
	}
	return min(DefaultPilotReviews, s.PilotCap())
}

// DropoutAfter is the inactivity after which an unfinished session counts
// as dropped.
func (s *Study) DropoutAfter() time.Duration {
	if d := s.fieldingOf().DropoutAfter; d > 0 {
		return time.Duration(d)
	}
	return DefaultDropoutAfter
}

// CloseGrace is how long sessions under way may go on after closing.
func (s *Study) CloseGrace() time.Duration {
	if d := s.fieldingOf().CloseGrace; d != nil {
		return time.Duration(*d)
	}
	return DefaultCloseGrace
}

// PriceOf returns an endpoint's price, and whether the study sets one.
func (s *Study) PriceOf(endpoint string) (Price, bool) {
	p, ok := s.fieldingOf().Prices[endpoint]
	return p, ok
}

// fielding checks the fielding block.
func (v *validator) fielding() {
	f := v.s.Fielding
	if f == nil {
		return
	}
	if f.PilotCap < 0 || f.PilotCap > 10000 {
		v.at(p("fielding", "pilot_cap"), "pilot_cap must be between 1 and 10000 (got %d)", f.PilotCap)
	}
	if f.PilotReviews < 0 {
		v.at(p("fielding", "pilot_reviews"), "pilot_reviews must be at least 1 (got %d)", f.PilotReviews)
	} else if f.PilotCap >= 0 && f.PilotReviews > v.s.PilotCap() {
		v.at(p("fielding", "pilot_reviews"), "pilot_reviews (%d) is more than a pilot takes (pilot_cap %d): the study could never go live", f.PilotReviews, v.s.PilotCap())
	}
	for _, t := range []struct{ key, text string }{{"consent", f.Consent}, {"debriefing", f.Debriefing}} {
		if len(t.text) > maxFieldingText {
			v.at(p("fielding", t.key), "%s is %d characters; the limit is %d", t.key, len(t.text), maxFieldingText)
		}
	}
	switch f.AIDisclosure {
	case "", DisclosureDebriefing:
	case DisclosurePage:
		if d, set := v.s.Texts["disclosure"]; set && strings.TrimSpace(d) == "" {
			v.at(p("texts", "disclosure"), "ai_disclosure is %q, but texts.disclosure is empty: the page would not tell respondents that an AI model writes the replies", DisclosurePage)
		}
	default:
		v.at(p("fielding", "ai_disclosure"), "ai_disclosure must be %q (the respondent page says so) or %q (respondents learn it in the debriefing), not %q", DisclosurePage, DisclosureDebriefing, f.AIDisclosure)
	}
	if d := time.Duration(f.DropoutAfter); d != 0 && (d < time.Minute || d > 7*24*time.Hour) {
		v.at(p("fielding", "dropout_after"), "dropout_after must be between 1m and 168h (got %s)", d)
	}
	if f.CloseGrace != nil && time.Duration(*f.CloseGrace) > 7*24*time.Hour {
		v.at(p("fielding", "close_grace"), "close_grace must be at most 168h (got %s)", time.Duration(*f.CloseGrace))
	}
	names := make([]string, 0, len(f.Prices))
	for name := range f.Prices {
		names = append(names, name)
	}
	slices.Sort(names)
	for _, name := range names {
		pr := f.Prices[name]
		if _, ok := v.s.Endpoints[name]; !ok {
			v.atKey(p("fielding", "prices", name), "prices names endpoint %q, which is not declared under endpoints", name)
		}
		for _, x := range []struct {
			key string
			n   float64
		}{{"input", pr.Input}, {"output", pr.Output}} {
			// written as !(in range) so that .nan is refused too
			if !(x.n >= 0 && x.n <= 1e6) || math.IsInf(x.n, 0) {
				v.at(p("fielding", "prices", name, x.key), "the %s price of %q must be between 0 and 1000000 per 1,000 tokens (got %g)", x.key, name, x.n)
			}
		}
	}
	if f.Currency != "" && !currencyPattern.MatchString(f.Currency) {
		v.at(p("fielding", "currency"), "currency must be a three-letter ISO 4217 code such as EUR or USD (got %q)", f.Currency)
	}
}

// FrozenChanges lists what next changes of the parts of s that a live
// study may not change: covariates, strata, allocation, the arms (their
// texts, prompts, limits and codes) and the model settings of the endpoints
// they use (kind, address, model, temperature, top_p, max_tokens, seed).
// Timeouts, attempts, key variables, texts of the page and the fielding
// block may change. Each entry names the field and what happened to it.
func (s *Study) FrozenChanges(next *Study) []string {
	var out []string
	changed := func(path, what string) { out = append(out, path+": "+what) }
	same := func(a, b any) bool { return reflect.DeepEqual(jsonValue(a), jsonValue(b)) }
	if !same(s.Covariates, next.Covariates) {
		changed("covariates", "the covariates changed")
	}
	if !same(s.Strata, next.Strata) {
		changed("strata", "the strata changed")
	}
	if !same(s.Allocation, next.Allocation) {
		changed("allocation", "the allocation changed")
	}
	if !slices.Equal(s.ArmOrder, next.ArmOrder) {
		changed("arms", fmt.Sprintf("the arms were %s and are now %s", strings.Join(s.ArmOrder, ", "), strings.Join(next.ArmOrder, ", ")))
	}
	for _, name := range s.ArmOrder {
		b, ok := next.Arms[name]
		if !ok {
			continue // reported with the arm list
		}
		for _, f := range diffFields(jsonValue(s.Arms[name]), jsonValue(b)) {
			changed("arms."+name+"."+f, "changed")
		}
	}
	frozen := []string{"kind", "base_url", "model", "temperature", "top_p", "max_tokens", "seed"}
	seen := map[string]bool{}
	for _, name := range s.ArmOrder {
		a := s.Arms[name]
		if a == nil || !a.NeedsModel() || seen[a.Endpoint] {
			continue
		}
		seen[a.Endpoint] = true
		ea, eb := s.Endpoints[a.Endpoint], next.Endpoints[a.Endpoint]
		if eb == nil {
			changed("endpoints."+a.Endpoint, "the endpoint was removed")
			continue
		}
		for _, f := range diffFields(jsonValue(ea), jsonValue(eb)) {
			if slices.Contains(frozen, f) {
				changed("endpoints."+a.Endpoint+"."+f, "changed")
			}
		}
	}
	return out
}

// jsonValue is v as encoding/json sees it, for comparing what the
// canonical form records.
func jsonValue(v any) any {
	b, err := json.Marshal(v)
	if err != nil {
		return err.Error()
	}
	var out any
	if err := json.Unmarshal(b, &out); err != nil {
		return err.Error()
	}
	return out
}

// diffFields lists, sorted, the top-level members in which two JSON objects
// differ.
func diffFields(a, b any) []string {
	ma, _ := a.(map[string]any)
	mb, _ := b.(map[string]any)
	var out []string
	for k, va := range ma {
		if !reflect.DeepEqual(va, mb[k]) {
			out = append(out, k)
		}
	}
	for k := range mb {
		if _, ok := ma[k]; !ok {
			out = append(out, k)
		}
	}
	slices.Sort(out)
	return out
}
