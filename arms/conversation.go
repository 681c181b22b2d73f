package arms

import (
	"fmt"
	"strings"
	"unicode"
	"unicode/utf8"
)

// Progress summarises a session's conversation for the reply rules.
type Progress struct {
	Replies   int  // respondent turns so far
	Assistant int  // model turns so far
	Owed      bool // a model turn is due and not yet written
	Finished  bool
}

// RuleError is a respondent action refused by the arm's rules. Status is
// the HTTP status that carries it; Rule names the rule for the page.
type RuleError struct {
	Status int
	Rule   string // too_short, too_long, empty, max_reached, waiting, finished, not_chat, min_not_met, too_early
	Msg    string
}

func (e *RuleError) Error() string { return e.Msg }

// Owed reports whether the arm is due a model turn, given the counts of
// turns so far: a message arm's single message, a chat's opening, or the
// answer to the respondent's last reply.
func (a *Arm) Owed(replies, assistant int) bool {
	switch a.Kind {
	case KindMessage:
		return assistant == 0
	case KindChat:
		want := replies
		if a.Opening {
			want++
		}
		return assistant < want
	}
	return false
}

// CheckReply applies the arm's reply rules to a new reply.
func (a *Arm) CheckReply(p Progress, text string) error {
	if a.Kind != KindChat {
		return &RuleError{409, "not_chat", "this part of the survey takes no replies"}
	}
	r := a.RepliesOf()
	switch {
	case p.Finished:
		return &RuleError{409, "finished", "this conversation is already finished"}
	case p.Replies >= r.Max:
		return &RuleError{409, "max_reached", fmt.Sprintf("the conversation allows at most %d replies", r.Max)}
	case p.Owed:
		return &RuleError{409, "waiting", "the previous reply has not been answered yet"}
	}
	if !utf8.ValidString(text) {
		return &RuleError{400, "invalid_text", "the reply is not valid UTF-8 text"}
	}
	trimmed := strings.TrimSpace(text)
	if trimmed == "" {
		return &RuleError{422, "empty", "the reply is empty"}
	}
	max := r.MaxChars
	if max == 0 {
		max = DefaultMaxChars
	}
	if n := utf8.RuneCountInString(trimmed); n > max {
		return &RuleError{422, "too_long", fmt.Sprintf("the reply has %d characters; the limit is %d", n, max)}
	}
	if n := CountWords(trimmed); n < r.MinWords {
		return &RuleError{422, "too_short", fmt.Sprintf("please write at least %d words (this reply has %d)", r.MinWords, n)}
	}
	return nil
}

// CheckFinish applies the arm's rules to the respondent's request to continue.
// elapsed is the time since the session began, in seconds.
func (a *Arm) CheckFinish(p Progress, elapsedSeconds float64) error {
	switch a.Kind {
	case KindChat:
		if min := a.RepliesOf().Min; p.Replies < min {
			return &RuleError{409, "min_not_met", fmt.Sprintf("the conversation needs at least %d replies before continuing (%d so far)", min, p.Replies)}
		}
		if p.Owed {
			return &RuleError{409, "waiting", "the last reply has not been answered yet"}
		}
	case KindMessage:
		if p.Owed {
			return &RuleError{409, "waiting", "the message has not been written yet"}
		}
		fallthrough
	case KindFixed:
		// a small allowance for clock skew between page and server
		if elapsedSeconds+1 < float64(a.MinSeconds) {
			return &RuleError{409, "too_early", fmt.Sprintf("please take at least %d seconds to read before continuing", a.MinSeconds)}
		}
	}
	return nil
}

// CountWords counts runs of letters or digits, the way a reader counts words;
// an apostrophe inside a word ("don't") does not split it, and apostrophes
// alone are no word. Scripts written without spaces count the way Unicode's
// default word boundaries (UAX #29, rule WB999) split them: each Han
// ideograph or hiragana character is a word of its own.
func CountWords(s string) int {
	n, in := 0, false
	for _, r := range s {
		switch {
		case unicode.In(r, unicode.Han, unicode.Hiragana):
			n++
			in = false
		case unicode.IsLetter(r) || unicode.IsDigit(r) || unicode.IsMark(r):
			if !in {
				n++
			}
			in = true
		case r == '\'' || r == '’':
			// joins the letters around it; starts nothing
		default:
			in = false
		}
	}
	return n
}
