// Package flags finds what an auditor should look at in a transcript: the
// model conceding its assigned side, repeating what it was told about the
// respondent, refusing or stepping out of role; the respondent satisficing
// or pasting; model errors; sessions that ran too long. Each finding is a
// Flag with a one-line reason. The package is pure: it sees one session's
// study, covariates, turns and failures, and knows nothing of SQL or HTTP.
//
// Flags are signs for a reviewer, not verdicts: each rule is a plain
// heuristic (common practice in transcript audits, with thresholds a study
// may tune in its flags block), and its near-misses are documented beside it.
package flags

import (
	"fmt"
	"slices"
	"strings"
	"time"
	"unicode"
	"unicode/utf8"

	"trialogue/arms"
	"trialogue/arms/drift"
)

// Flag is one finding about a session.
type Flag struct {
	Code   string // one of Codes
	Reason string // one line for a reviewer; quotes no reply (a revealed flag names the covariate value)
}

// The flag codes, in the order flags are listed and exported.
const (
	Conceded   = "conceded"
	Revealed   = "revealed"
	Refused    = "refused"
	Satisficed = "satisficed"
	Pasted     = "pasted"
	Errors     = "errors"
	Overtime   = "overtime"
)

// Codes lists every flag code in a stable order.
var Codes = []string{Conceded, Revealed, Refused, Satisficed, Pasted, Errors, Overtime}

// Roles of a turn, as the store writes them.
const (
	RoleAssistant  = "assistant"
	RoleRespondent = "respondent"
)

// Defaults of the thresholds a study's flags block may change.
const (
	DefaultShortWords = 4
	DefaultTimeLimit  = 30 * time.Minute
)

// Thresholds of the typing-speed rule, fixed: a reply of FastMinWords or
// more words written in under FastMSPerWord milliseconds per word. Shorter
// replies are left to the short-reply rule, since anyone types "yes" in a
// second.
const (
	FastMSPerWord = 1000
	FastMinWords  = 3
)

// DefaultConcede are the phrases with which a model gives up the side it
// was told to argue (the project's own list; a study replaces it with
// flags.concede). Acknowledging a point and then answering it ("That's a
// fair point. Consider ...") is persuasion, not concession, so such phrases
// are not on the list, and a listed phrase followed by "but" or "however"
// does not count either.
var DefaultConcede = []string{
	"you have convinced me",
	"you've convinced me",
	"you have changed my mind",
	"you've changed my mind",
	"i have changed my mind",
	"i've changed my mind",
	"i changed my mind",
	"i agree with you",
	"i completely agree",
	"i fully agree",
	"you are right",
	"you're right",
	"you are absolutely right",
	"you're absolutely right",
	"i was wrong",
	"i concede",
	"i can't argue with that",
	"i cannot argue with that",
	"i'll stop trying to convince you",
	"i won't try to change your mind",
	"i no longer think",
}

// Settings are the rules in force for a study: its flags block over the
// defaults.
type Settings struct {
	Concede    []string        // normalised phrases
	Argue      map[string]bool // arms in which the model argues a side
	Reveal     []string        // covariates the model must not repeat
	ShortWords int
	TimeLimit  time.Duration
}

// SettingsOf returns the rules in force for def.
func SettingsOf(def *arms.Study) Settings {
	st := Settings{ShortWords: DefaultShortWords, TimeLimit: DefaultTimeLimit, Argue: map[string]bool{}}
	var f arms.FlagSettings
	if def.Flags != nil {
		f = *def.Flags
	}
	concede := DefaultConcede
	if len(f.Concede) > 0 {
		concede = f.Concede
	}
	for _, ph := range concede {
		st.Concede = append(st.Concede, normalise(ph))
	}
	if len(f.Argue) > 0 {
		for _, a := range f.Argue {
			st.Argue[a] = true
		}
	} else {
		for name, a := range def.Arms {
			if a != nil && a.Kind == arms.KindChat {
				st.Argue[name] = true
			}
		}
	}
	st.Reveal = f.Reveal
	if len(st.Reveal) == 0 {
		for _, c := range def.Covariates {
			st.Reveal = append(st.Reveal, c.Name)
		}
	}
	if f.ShortWords > 0 {
		st.ShortWords = f.ShortWords
	}
	if f.TimeLimit > 0 {
		st.TimeLimit = time.Duration(f.TimeLimit)
	}
	return st
}

// Definition is what a flag code means under a study's settings, for the
// console's legend and the export's codebook.
type Definition struct {
	Code    string
	Meaning string
}

// Describe lists every flag with its meaning under def's settings.
func Describe(def *arms.Study) []Definition {
	st := SettingsOf(def)
	argue := make([]string, 0, len(st.Argue))
	for _, name := range def.ArmOrder {
		if st.Argue[name] {
			argue = append(argue, name)
		}
	}
	return []Definition{
		{Conceded, fmt.Sprintf("in an arm that argues a side (%s), a model message uses a phrase of giving up that side (%d phrases), not negated, not followed by \"but\" or \"however\", not in a question", strings.Join(argue, ", "), len(st.Concede))},
		{Revealed, fmt.Sprintf("a model message contains the value of a covariate (%s) that the arm's prompts gave the model and that the respondent had not written first", strings.Join(st.Reveal, ", "))},
		{Refused, "a model message declines (\"I can't help with that\"), speaks as an AI system instead of its role (\"as an AI language model\"), or claims to be a human"},
		{Satisficed, fmt.Sprintf("at least half of the replies are under %d words, or a reply repeats an earlier one, or a reply of %d or more words was written in under %d ms per word (typing time, or the time since the previous message when the page sent no typing measures)", st.ShortWords, FastMinWords, FastMSPerWord)},
		{Pasted, "the respondent page recorded a paste or drop into the reply box"},
		{Errors, "a model call failed after every retry, or a model message needed retries"},
		{Overtime, fmt.Sprintf("more than %s passed from entry to finishing (or to the last message of an unfinished session)", roundDuration(st.TimeLimit))},
	}
}

// Session is what Compute needs to know of one session.
type Session struct {
	Arm        string
	Covariates map[string]string
	Entered    time.Time
	Finished   time.Time // zero while unfinished
	Turns      []Turn    // in order
	Failures   []Failure
}

// Turn is one message of a session.
type Turn struct {
	Role      string // RoleAssistant or RoleRespondent
	Text      string
	StartedAt time.Time // model turns: when the request began
	CreatedAt time.Time // when the turn was stored
	LatencyMS int64     // model turns
	Retries   int       // model turns: attempts beyond the first
	Typing    *Typing   // respondent turns: nil when the page sent none
}

// Failure is a model call that failed after every retry.
type Failure struct {
	At       time.Time
	Kind     string
	Attempts int
}

// Compute returns a session's flags, in the order of Codes.
func Compute(def *arms.Study, s Session) []Flag {
	st := SettingsOf(def)
	var out []Flag
	add := func(code, reason string) {
		if reason != "" {
			out = append(out, Flag{Code: code, Reason: reason})
		}
	}
	add(Conceded, conceded(st, s))
	add(Revealed, revealed(def, st, s))
	add(Refused, refused(s))
	add(Satisficed, satisficed(st, s))
	add(Pasted, pasted(s))
	add(Errors, errorsOf(s))
	add(Overtime, overtime(st, s))
	return out
}

// numbered calls fn with each turn of role and its 1-based number among
// the turns of that role.
func numbered(turns []Turn, role string, fn func(n, idx int, t Turn)) {
	n := 0
	for i, t := range turns {
		if t.Role == role {
			n++
			fn(n, i, t)
		}
	}
}

func conceded(st Settings, s Session) string {
	if !st.Argue[s.Arm] {
		return ""
	}
	var hits []string
	numbered(s.Turns, RoleAssistant, func(n, _ int, t Turn) {
		if ph := concession(normalise(t.Text), st.Concede); ph != "" {
			hits = append(hits, fmt.Sprintf("model message %d says %q", n, ph))
		}
	})
	return joinReasons(hits)
}

// negators, read in the few words before a phrase, turn it around.
var negators = []string{"not", "no", "never", "nor", "hardly", "cannot", "don't", "doesn't", "didn't", "isn't", "aren't", "wasn't", "won't", "wouldn't", "can't", "couldn't", "shouldn't"}

// contrasts after a phrase make it a partial acknowledgement.
var contrasts = []string{"but", "however", "although", "though", "that said", "still"}

// concession returns the first phrase that text uses as a concession.
func concession(text string, phrases []string) string {
	for _, ph := range phrases {
		for from := 0; ; {
			i := indexWord(text[from:], ph)
			if i < 0 {
				break
			}
			start := from + i
			end := start + len(ph)
			from = end
			sentStart := strings.LastIndexAny(text[:start], ".!?;") + 1
			before := strings.Fields(text[sentStart:start])
			if len(before) > 3 {
				before = before[len(before)-3:]
			}
			if slices.ContainsFunc(before, func(w string) bool {
				w = strings.Trim(w, ",:\"'()")
				return slices.Contains(negators, w)
			}) {
				continue // "I don't think you're right"
			}
			rest := text[end:]
			sentEnd := strings.IndexAny(rest, ".!?;")
			if sentEnd >= 0 && rest[sentEnd] == '?' {
				continue // asked, not said
			}
			clause := rest
			if sentEnd >= 0 {
				clause = rest[:sentEnd]
				// the next sentence may turn it too: "You're right. But ..."
				next := strings.TrimLeft(rest[sentEnd+1:], " \"')")
				if startsWithAny(next, contrasts) {
					continue
				}
			}
			if containsAnyWord(clause, contrasts) {
				continue // "you're right that ..., but ..."
			}
			return ph
		}
	}
	return ""
}

func revealed(def *arms.Study, st Settings, s Session) string {
	covs := make(map[string]string)
	for _, name := range st.Reveal {
		if v := strings.TrimSpace(s.Covariates[name]); utf8.RuneCountInString(v) >= 2 {
			covs[name] = normalise(v)
		}
	}
	if len(covs) == 0 {
		return ""
	}
	arm, ok := def.Arms[s.Arm]
	if !ok || arm == nil || !arm.NeedsModel() {
		return ""
	}
	rendered, err := def.Render(s.Arm, arms.Respondent{Covariates: s.Covariates})
	if err != nil {
		return "" // the prompts cannot be rebuilt under this study version: nothing to compare with
	}
	prompt := normalise(rendered.System + "\n" + rendered.Prompt)
	given := map[string]bool{}
	for name, v := range covs {
		given[name] = indexWord(prompt, v) >= 0
	}
	said := map[string]bool{} // the respondent wrote it first
	var hits []string
	n := 0
	for _, t := range s.Turns {
		text := normalise(t.Text)
		if t.Role == RoleRespondent {
			for name, v := range covs {
				if indexWord(text, v) >= 0 {
					said[name] = true
				}
			}
			continue
		}
		n++
		for _, c := range def.Covariates {
			v, ok := covs[c.Name]
			if !ok || !given[c.Name] || said[c.Name] {
				continue
			}
			if indexWord(text, v) >= 0 {
				hits = append(hits, fmt.Sprintf("model message %d repeats the respondent's %s (%s) from its prompt", n, c.Name, s.Covariates[c.Name]))
				said[c.Name] = true // one report per covariate
			}
		}
	}
	return joinReasons(hits)
}

// claimsHuman matches a model saying it is a person.
func claimsHuman(text string) bool {
	for _, ph := range []string{"i'm a human", "i am a human", "i'm human", "i am human", "i'm a real person", "i am a real person", "i'm a person", "i am a person", "i'm not an ai", "i am not an ai", "i'm not a bot", "i am not a bot"} {
		if indexWord(text, ph) >= 0 {
			return true
		}
	}
	return false
}

func refused(s Session) string {
	var hits []string
	numbered(s.Turns, RoleAssistant, func(n, _ int, t Turn) {
		text := normalise(t.Text)
		switch {
		case drift.Refuses(text):
			hits = append(hits, fmt.Sprintf("model message %d declines or speaks as an AI instead of its role", n))
		case claimsHuman(text):
			hits = append(hits, fmt.Sprintf("model message %d claims to be a human", n))
		}
	})
	return joinReasons(hits)
}

func satisficed(st Settings, s Session) string {
	var replies []Turn
	numbered(s.Turns, RoleRespondent, func(_, _ int, t Turn) { replies = append(replies, t) })
	if len(replies) == 0 {
		return ""
	}
	var hits []string
	short := 0
	for _, t := range replies {
		if arms.CountWords(t.Text) < st.ShortWords {
			short++
		}
	}
	if short*2 >= len(replies) {
		hits = append(hits, fmt.Sprintf("%d of %d replies under %d words", short, len(replies), st.ShortWords))
	}
	seen := map[string]int{}
	for i, t := range replies {
		key := strings.Join(wordsOf(t.Text), " ")
		if key == "" {
			continue
		}
		if j, ok := seen[key]; ok {
			hits = append(hits, fmt.Sprintf("reply %d repeats reply %d", i+1, j+1))
			continue
		}
		seen[key] = i
	}
	prev := s.Entered
	k := 0
	for _, t := range s.Turns {
		if t.Role != RoleRespondent {
			prev = t.CreatedAt
			continue
		}
		k++
		words := arms.CountWords(t.Text)
		var ms int64
		var how string
		switch {
		case t.Typing != nil && t.Typing.Pastes > 0:
			prev = t.CreatedAt
			continue // a pasted reply is flagged as pasted
		case t.Typing != nil:
			ms, how = t.Typing.TypingMS, "typed"
		case !prev.IsZero():
			ms, how = t.CreatedAt.Sub(prev).Milliseconds(), "sent"
		default:
			prev = t.CreatedAt
			continue
		}
		prev = t.CreatedAt
		if words >= FastMinWords && ms < int64(words)*FastMSPerWord {
			if how == "typed" {
				hits = append(hits, fmt.Sprintf("reply %d: %d words typed in %.1f s", k, words, float64(ms)/1000))
			} else {
				hits = append(hits, fmt.Sprintf("reply %d: %d words sent %.1f s after the previous message", k, words, float64(ms)/1000))
			}
		}
	}
	return joinReasons(hits)
}

func pasted(s Session) string {
	var hits []string
	numbered(s.Turns, RoleRespondent, func(n, _ int, t Turn) {
		if t.Typing == nil || t.Typing.Pastes == 0 {
			return
		}
		h := fmt.Sprintf("reply %d: %s", n, plural(t.Typing.Pastes, "paste", "pastes"))
		if t.Typing.Keystrokes > 0 {
			h += ", " + plural(t.Typing.Keystrokes, "keystroke", "keystrokes")
		}
		if t.Typing.HiddenCount > 0 {
			h += fmt.Sprintf(", page hidden %s", plural(t.Typing.HiddenCount, "time", "times"))
		}
		hits = append(hits, h)
	})
	return joinReasons(hits)
}

func errorsOf(s Session) string {
	var hits []string
	if n := len(s.Failures); n > 0 {
		hits = append(hits, fmt.Sprintf("%s failed after every retry", plural(int64(n), "model call", "model calls")))
	}
	numbered(s.Turns, RoleAssistant, func(n, _ int, t Turn) {
		if t.Retries > 0 {
			hits = append(hits, fmt.Sprintf("model message %d needed %s", n, plural(int64(t.Retries), "retry", "retries")))
		}
	})
	return joinReasons(hits)
}

func overtime(st Settings, s Session) string {
	end, what := s.Finished, "finished"
	if end.IsZero() {
		what = "last message"
		for _, t := range s.Turns {
			if t.CreatedAt.After(end) {
				end = t.CreatedAt
			}
		}
	}
	if end.IsZero() || s.Entered.IsZero() {
		return ""
	}
	if d := end.Sub(s.Entered); d > st.TimeLimit {
		return fmt.Sprintf("%s %s after entry; the limit is %s", what, roundDuration(d), roundDuration(st.TimeLimit))
	}
	return ""
}

// roundDuration writes a span to the second, without trailing zero units.
func roundDuration(d time.Duration) string {
	s := d.Round(time.Second).String()
	for _, z := range []string{"m0s", "h0m"} {
		if strings.HasSuffix(s, z) {
			s = strings.TrimSuffix(s, z[1:])
		}
	}
	return s
}

func plural(n int64, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return fmt.Sprintf("%d %s", n, many)
}

func joinReasons(hits []string) string {
	const most = 3
	if len(hits) > most {
		return strings.Join(hits[:most], "; ") + fmt.Sprintf("; and %d more", len(hits)-most)
	}
	return strings.Join(hits, "; ")
}

// normalise lowercases text, writes typographic apostrophes as ' and
// collapses white space, so that phrases match however they are typed.
func normalise(s string) string {
	s = strings.NewReplacer("’", "'", "‘", "'", "ʼ", "'").Replace(strings.ToLower(s))
	return strings.Join(strings.Fields(s), " ")
}

// wordsOf lists the lowercase words of s (letters and digits; an
// apostrophe joins), for comparing replies regardless of punctuation.
func wordsOf(s string) []string {
	return strings.FieldsFunc(normalise(s), func(r rune) bool {
		return !(unicode.IsLetter(r) || unicode.IsDigit(r) || unicode.IsMark(r) || r == '\'')
	})
}

// indexWord finds sub in s where it stands as a whole: not inside a longer
// word, and for numbers not inside a longer number (47 is not in 1947,
// 4.47 or 47,000).
func indexWord(s, sub string) int {
	if sub == "" {
		return -1
	}
	for from := 0; from <= len(s)-len(sub); {
		i := strings.Index(s[from:], sub)
		if i < 0 {
			return -1
		}
		start, end := from+i, from+i+len(sub)
		if boundary(s, start, end) {
			return start
		}
		from = start + 1
	}
	return -1
}

func boundary(s string, start, end int) bool {
	before, _ := utf8.DecodeLastRuneInString(s[:start])
	after, _ := utf8.DecodeRuneInString(s[end:])
	first, _ := utf8.DecodeRuneInString(s[start:])
	last, _ := utf8.DecodeLastRuneInString(s[:end])
	if start > 0 && isWordRune(first) && isWordRune(before) {
		return false
	}
	if end < len(s) && isWordRune(last) && isWordRune(after) {
		return false
	}
	if unicode.IsDigit(first) && start > 1 && (before == '.' || before == ',') {
		if r, _ := utf8.DecodeLastRuneInString(s[:start-1]); unicode.IsDigit(r) {
			return false
		}
	}
	if unicode.IsDigit(last) && end+1 < len(s) && (after == '.' || after == ',') {
		if r, _ := utf8.DecodeRuneInString(s[end+1:]); unicode.IsDigit(r) {
			return false
		}
	}
	return true
}

func isWordRune(r rune) bool { return unicode.IsLetter(r) || unicode.IsDigit(r) || unicode.IsMark(r) }

func startsWithAny(s string, words []string) bool {
	for _, w := range words {
		if strings.HasPrefix(s, w) && boundary(s, 0, len(w)) {
			return true
		}
	}
	return false
}

func containsAnyWord(s string, words []string) bool {
	for _, w := range words {
		if indexWord(s, w) >= 0 {
			return true
		}
	}
	return false
}
