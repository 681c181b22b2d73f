// Package drift compares a model's answers to fixed probe conversations
// across runs, to tell whether the model behind an endpoint has changed: the
// model name and fingerprint it reports, how often replies repeat exactly,
// how similar their words are (with the baseline's own run-to-run spread as
// the yardstick), whether reply lengths have shifted (two-sample
// Kolmogorov–Smirnov test), and whether it now refuses or breaks role.
package drift

import (
	"fmt"
	"math"
	"regexp"
	"sort"
	"strings"
	"unicode"
)

// Statuses of a check, from best to worst.
const (
	Pass = "pass"
	Warn = "warn"
	Fail = "fail"
)

// Output is one model reply in a probe run.
type Output struct {
	Probe         string `json:"probe"`
	Arm           string `json:"arm"`
	Run           int    `json:"run"`  // 0-based repetition within the drift run
	Turn          int    `json:"turn"` // 0-based model turn within the probe conversation
	Text          string `json:"text"`
	ModelReported string `json:"model_reported"`
	Fingerprint   string `json:"fingerprint,omitempty"`
}

// Thresholds decide pass, warn and fail. Drops are measured from the
// baseline's own run-to-run agreement to the agreement between the current
// run and the baseline.
type Thresholds struct {
	ExactWarn, ExactFail           float64 // drop in the exact-match rate
	SimilarityWarn, SimilarityFail float64 // drop in the mean cosine similarity
	KSWarn, KSFail                 float64 // p-value of the length test below which it warns or fails
}

// DefaultThresholds are used where a study sets none (common practice for
// a screening check; a study tunes them to its model).
var DefaultThresholds = Thresholds{ExactWarn: 0.10, ExactFail: 0.25, SimilarityWarn: 0.10, SimilarityFail: 0.25, KSWarn: 0.05, KSFail: 0.01}

// Check is one comparison and its outcome.
type Check struct {
	Name   string  `json:"name"`
	Status string  `json:"status"`
	Value  float64 `json:"value"`
	Detail string  `json:"detail"`
}

// Report is the outcome of comparing a run with a reference run.
type Report struct {
	Status  string  `json:"status"`
	Checks  []Check `json:"checks"`
	Summary string  `json:"summary"`
}

// Compare compares current outputs with reference outputs (the baseline or
// the previous run).
func Compare(reference, current []Output, th Thresholds) Report {
	var r Report
	add := func(c Check) { r.Checks = append(r.Checks, c) }

	// Models and fingerprints.
	refModels, curModels := set(reference, func(o Output) string { return o.ModelReported }), set(current, func(o Output) string { return o.ModelReported })
	if !equalSets(refModels, curModels) {
		add(Check{"model reported", Fail, 0, fmt.Sprintf("the endpoint reported %s, the reference %s", list(curModels), list(refModels))})
	} else {
		add(Check{"model reported", Pass, 1, "the same model name as the reference: " + list(curModels)})
	}
	refFP, curFP := set(reference, func(o Output) string { return o.Fingerprint }), set(current, func(o Output) string { return o.Fingerprint })
	if !equalSets(refFP, curFP) {
		add(Check{"fingerprint", Warn, 0, fmt.Sprintf("the system fingerprint is %s, the reference had %s", list(curFP), list(refFP))})
	} else {
		add(Check{"fingerprint", Pass, 1, "the same system fingerprint as the reference"})
	}

	// Agreement of replies at the same place of the same probe.
	type place struct {
		probe, arm string
		turn       int
	}
	group := func(outs []Output) map[place][]string {
		m := map[place][]string{}
		for _, o := range outs {
			k := place{o.Probe, o.Arm, o.Turn}
			m[k] = append(m[k], o.Text)
		}
		return m
	}
	ref, cur := group(reference), group(current)
	var selfExact, crossExact, selfSim, crossSim mean
	missing := 0
	for k, rs := range ref {
		cs, ok := cur[k]
		if !ok {
			missing++
			continue
		}
		for i := range rs {
			for j := i + 1; j < len(rs); j++ {
				selfExact.add(b2f(rs[i] == rs[j]))
				selfSim.add(Cosine(rs[i], rs[j]))
			}
			for _, c := range cs {
				crossExact.add(b2f(rs[i] == c))
				crossSim.add(Cosine(rs[i], c))
			}
		}
	}
	if missing > 0 || len(cur) != len(ref) {
		add(Check{"probe coverage", Fail, float64(missing), fmt.Sprintf("%d probe turn(s) of the reference have no counterpart in this run (%d places vs %d)", missing, len(cur), len(ref))})
	}
	self := selfExact.or(1) // a single reference run agrees with itself
	drop := self - crossExact.or(0)
	add(Check{"exact match", grade(drop, th.ExactWarn, th.ExactFail), crossExact.or(0),
		fmt.Sprintf("%.0f%% of replies match the reference word for word; the reference's runs matched each other %.0f%% of the time", 100*crossExact.or(0), 100*self)})
	selfS := selfSim.or(1)
	dropS := selfS - crossSim.or(0)
	add(Check{"lexical similarity", grade(dropS, th.SimilarityWarn, th.SimilarityFail), crossSim.or(0),
		fmt.Sprintf("mean cosine similarity of word 1- and 2-grams to the reference %.2f; the reference's runs among themselves %.2f", crossSim.or(0), selfS)})

	// Lengths.
	lx, ly := lengths(reference), lengths(current)
	if len(lx) > 0 && len(ly) > 0 {
		d, p := KS2(lx, ly)
		st := Pass
		switch {
		case p < th.KSFail:
			st = Fail
		case p < th.KSWarn:
			st = Warn
		}
		add(Check{"reply length", st, p, fmt.Sprintf("two-sample Kolmogorov–Smirnov test of reply lengths in words: D = %.3f, p = %.3g (median %g words now, %g in the reference)", d, p, median(ly), median(lx))})
	}

	// Refusals and role breaks.
	rr, cr := countRefusals(reference), countRefusals(current)
	switch {
	case cr > 0 && rr == 0:
		add(Check{"refusals and role breaks", Fail, float64(cr), fmt.Sprintf("%d reply(ies) refuse or step out of role; the reference had none", cr)})
	case cr > rr:
		add(Check{"refusals and role breaks", Warn, float64(cr), fmt.Sprintf("%d reply(ies) refuse or step out of role; the reference had %d", cr, rr)})
	default:
		add(Check{"refusals and role breaks", Pass, float64(cr), fmt.Sprintf("%d reply(ies) refuse or step out of role (reference: %d)", cr, rr)})
	}

	r.Status = Pass
	var bad []string
	for _, c := range r.Checks {
		if rank(c.Status) > rank(r.Status) {
			r.Status = c.Status
		}
		if c.Status != Pass {
			bad = append(bad, c.Name+" ("+c.Status+")")
		}
	}
	if len(bad) == 0 {
		r.Summary = "The model behaves as in the reference run: same model, matching replies, no new refusals."
	} else {
		r.Summary = "The model's behaviour differs from the reference run: " + strings.Join(bad, ", ") + ". Read the replies before fielding."
	}
	return r
}

func grade(drop, warn, fail float64) string {
	switch {
	case drop > fail:
		return Fail
	case drop > warn:
		return Warn
	}
	return Pass
}

func rank(s string) int {
	switch s {
	case Fail:
		return 2
	case Warn:
		return 1
	}
	return 0
}

type mean struct {
	sum float64
	n   int
}

func (m *mean) add(v float64) { m.sum += v; m.n++ }
func (m mean) or(def float64) float64 {
	if m.n == 0 {
		return def
	}
	return m.sum / float64(m.n)
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

func set(outs []Output, f func(Output) string) map[string]bool {
	m := map[string]bool{}
	for _, o := range outs {
		m[f(o)] = true
	}
	return m
}

func equalSets(a, b map[string]bool) bool {
	if len(a) != len(b) {
		return false
	}
	for k := range a {
		if !b[k] {
			return false
		}
	}
	return true
}

func list(m map[string]bool) string {
	var out []string
	for k := range m {
		if k == "" {
			k = "(none)"
		}
		out = append(out, k)
	}
	sort.Strings(out)
	return strings.Join(out, ", ")
}

func lengths(outs []Output) []float64 {
	out := make([]float64, len(outs))
	for i, o := range outs {
		out[i] = float64(len(words(o.Text)))
	}
	return out
}

func median(v []float64) float64 {
	s := append([]float64(nil), v...)
	sort.Float64s(s)
	n := len(s)
	if n == 0 {
		return 0
	}
	if n%2 == 1 {
		return s[n/2]
	}
	return (s[n/2-1] + s[n/2]) / 2
}

// words splits text into lowercase words of letters and digits.
func words(s string) []string {
	return strings.FieldsFunc(strings.ToLower(s), func(r rune) bool { return !unicode.IsLetter(r) && !unicode.IsDigit(r) })
}

// Cosine is the cosine similarity of the word 1- and 2-gram count vectors
// of two texts: 1 for the same words in the same order, 0 for no word in common.
func Cosine(a, b string) float64 {
	va, vb := grams(a), grams(b)
	var dot, na, nb float64
	for k, x := range va {
		na += x * x
		dot += x * vb[k]
	}
	for _, y := range vb {
		nb += y * y
	}
	if na == 0 && nb == 0 {
		return 1
	}
	if na == 0 || nb == 0 {
		return 0
	}
	return dot / math.Sqrt(na*nb)
}

func grams(s string) map[string]float64 {
	w := words(s)
	m := make(map[string]float64, 2*len(w))
	for i, x := range w {
		m[x]++
		if i > 0 {
			m[w[i-1]+" "+x]++
		}
	}
	return m
}

// refusal matches the phrases with which chat models commonly decline or
// step out of an assigned role (common practice; a study can read the
// replies for anything subtler).
var refusal = regexp.MustCompile(`(?i)\b(i can(?:no|')t (?:help|assist|comply|continue|do that)|i(?: am|'m) (?:not able|unable) to (?:help|assist|continue)|as an ai(?: language model)?|i(?: am|'m) (?:just )?an ai|i must decline|i won't be able to)\b`)

func countRefusals(outs []Output) int {
	n := 0
	for _, o := range outs {
		if refusal.MatchString(o.Text) {
			n++
		}
	}
	return n
}

// Refuses reports whether a reply reads as a refusal or a role break.
func Refuses(text string) bool { return refusal.MatchString(text) }
