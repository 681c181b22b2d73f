package arms

import (
	"errors"
	"net/http"
	"strings"
	"testing"
)

// checkRule compares err with the rule and status wanted; rule "" wants nil.
func checkRule(tb testing.TB, err error, rule string, status int) {
	tb.Helper()
	if rule == "" {
		if err != nil {
			tb.Errorf("got %v, want no error", err)
		}
		return
	}
	var re *RuleError
	if !errors.As(err, &re) {
		tb.Fatalf("got %v, want a *RuleError %s", err, rule)
	}
	if re.Rule != rule || re.Status != status {
		tb.Errorf("got %s (%d), want %s (%d)", re.Rule, re.Status, rule, status)
	}
	if re.Error() == "" {
		tb.Errorf("got an empty message, want one for the page")
	}
}

func TestCheckReply(t *testing.T) {
	chat := &Arm{Kind: KindChat, Replies: &Replies{Min: 2, Max: 3, MinWords: 3, MaxChars: 40}}
	fixed := &Arm{Kind: KindFixed, Text: "Fernbrook plans a footbridge."}
	message := &Arm{Kind: KindMessage}
	const ok = "I like the footbridge plan"
	tests := []struct {
		name   string
		arm    *Arm
		p      Progress
		text   string
		rule   string
		status int
	}{
		{"OK", chat, Progress{Replies: 1, Assistant: 1}, ok, "", 0},
		{"OKSpacesTrimmedBeforeLimit", chat, Progress{}, "  " + strings.Repeat("ab ", 13) + "a  ", "", 0},
		{"ErrNotChatFixed", fixed, Progress{}, ok, "not_chat", http.StatusConflict},
		{"ErrNotChatMessage", message, Progress{Assistant: 1}, ok, "not_chat", http.StatusConflict},
		{"ErrFinished", chat, Progress{Replies: 1, Assistant: 1, Finished: true}, ok, "finished", http.StatusConflict},
		{"ErrMaxReached", chat, Progress{Replies: 3, Assistant: 3}, ok, "max_reached", http.StatusConflict},
		{"ErrWaiting", chat, Progress{Replies: 1, Owed: true}, ok, "waiting", http.StatusConflict},
		{"ErrEmpty", chat, Progress{}, " \t\n ", "empty", http.StatusUnprocessableEntity},
		{"ErrTooLong", chat, Progress{}, strings.Repeat("word ", 9), "too_long", http.StatusUnprocessableEntity},
		{"ErrTooLongInCharactersNotBytes", chat, Progress{}, strings.Repeat("é", 41), "too_long", http.StatusUnprocessableEntity},
		{"ErrTooShort", chat, Progress{}, "yes indeed", "too_short", http.StatusUnprocessableEntity},
		{"ErrTooShortPunctuation", chat, Progress{}, "ok ... !!! ---", "too_short", http.StatusUnprocessableEntity},
		{"ErrInvalidUTF8", chat, Progress{}, "good \xff plan here", "invalid_text", http.StatusBadRequest},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			checkRule(t, tt.arm.CheckReply(tt.p, tt.text), tt.rule, tt.status)
		})
	}
	t.Run("OKNonLatinWithinCharLimit", func(t *testing.T) {
		// 40 characters of Cyrillic are 80 bytes: the limit counts characters
		checkRule(t, chat.CheckReply(Progress{}, "мост "+strings.Repeat("ж", 30)+" река"), "", 0)
	})
	t.Run("OKDefaultMaxChars", func(t *testing.T) {
		a := &Arm{Kind: KindChat, Replies: &Replies{Max: 1}}
		checkRule(t, a.CheckReply(Progress{}, strings.Repeat("a", DefaultMaxChars)), "", 0)
		checkRule(t, a.CheckReply(Progress{}, strings.Repeat("a", DefaultMaxChars+1)), "too_long", http.StatusUnprocessableEntity)
	})
}

func TestCheckFinish(t *testing.T) {
	chat := &Arm{Kind: KindChat, Replies: &Replies{Min: 2, Max: 3}}
	fixed := &Arm{Kind: KindFixed, Text: "Fernbrook plans a footbridge.", MinSeconds: 20}
	message := &Arm{Kind: KindMessage, MinSeconds: 10}
	tests := []struct {
		name    string
		arm     *Arm
		p       Progress
		elapsed float64
		rule    string
		status  int
	}{
		{"OKChat", chat, Progress{Replies: 2, Assistant: 2}, 0, "", 0},
		{"ErrMinNotMet", chat, Progress{Replies: 1, Assistant: 1}, 600, "min_not_met", http.StatusConflict},
		{"ErrChatOwed", chat, Progress{Replies: 2, Assistant: 1, Owed: true}, 600, "waiting", http.StatusConflict},
		{"OKFixed", fixed, Progress{}, 20, "", 0},
		{"OKFixedClockSkewAllowance", fixed, Progress{}, 19.5, "", 0},
		{"ErrTooEarlyFixed", fixed, Progress{}, 18.9, "too_early", http.StatusConflict},
		{"OKMessage", message, Progress{Assistant: 1}, 12, "", 0},
		{"ErrMessageOwed", message, Progress{Owed: true}, 600, "waiting", http.StatusConflict},
		{"ErrTooEarlyMessage", message, Progress{Assistant: 1}, 3, "too_early", http.StatusConflict},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			checkRule(t, tt.arm.CheckFinish(tt.p, tt.elapsed), tt.rule, tt.status)
		})
	}
}

func TestOwed(t *testing.T) {
	message := &Arm{Kind: KindMessage}
	chat := &Arm{Kind: KindChat, Replies: &Replies{Max: 3}}
	opening := &Arm{Kind: KindChat, Opening: true, Replies: &Replies{Max: 3}}
	fixed := &Arm{Kind: KindFixed}
	tests := []struct {
		name               string
		arm                *Arm
		replies, assistant int
		want               bool
	}{
		{"OwedMessageNotYetWritten", message, 0, 0, true},
		{"NotOwedMessageWritten", message, 0, 1, false},
		{"NotOwedChatBeforeFirstReply", chat, 0, 0, false},
		{"OwedChatAnswer", chat, 1, 0, true},
		{"NotOwedChatAnswered", chat, 2, 2, false},
		{"OwedOpening", opening, 0, 0, true},
		{"NotOwedAfterOpening", opening, 0, 1, false},
		{"OwedOpeningAnswer", opening, 1, 1, true},
		{"NotOwedOpeningAnswered", opening, 1, 2, false},
		{"NotOwedFixed", fixed, 0, 0, false},
	}
	for _, tt := range tests {
		t.Run(tt.name, func(t *testing.T) {
			if got := tt.arm.Owed(tt.replies, tt.assistant); got != tt.want {
				t.Errorf("Owed(%d, %d): got %v, want %v", tt.replies, tt.assistant, got, tt.want)
			}
		})
	}
}

// TestCountWords follows the default word boundaries of Unicode Standard
// Annex #29 (Text Segmentation, section 4.1): letters and digits form words,
// an apostrophe between letters does not split one (rule WB6/WB7, MidLetter),
// punctuation alone is no word, and ideographs, which carry no spaces, are
// each a word (rule WB999).
func TestCountWords(t *testing.T) {
	tests := []struct {
		in   string
		want int
	}{
		{"", 0},
		{"   \t\n", 0},
		{"the footbridge", 2},
		{"the footbridge,it's fine!", 4},
		{"don't won’t", 2},
		{"' ’ '", 0},
		{"... !!! --- ???", 0},
		{"well-known route", 3},
		{"route 66", 2},
		{"Мост через реку", 3},
		{"Η γέφυρα είναι καλή", 4},
		{"الجسر جميل", 2},
		{"नमस्ते दुनिया", 2},
		{"我喜欢这座桥", 6},
		{"はい、いいです", 6},
		{"café naïve", 2},
	}
	for _, tt := range tests {
		if got := CountWords(tt.in); got != tt.want {
			t.Errorf("CountWords(%q): got %d, want %d", tt.in, got, tt.want)
		}
	}
}

// TestRepliesOf checks the zero limits of arms without replies.
func TestRepliesOf(t *testing.T) {
	a := &Arm{Kind: KindFixed}
	if got := a.RepliesOf(); got != (Replies{}) {
		t.Errorf("got %+v, want zero limits", got)
	}
	if a.NeedsModel() {
		t.Errorf("fixed arm NeedsModel: got true, want false")
	}
	if !(&Arm{Kind: KindMessage}).NeedsModel() || !(&Arm{Kind: KindChat}).NeedsModel() {
		t.Errorf("message and chat arms NeedsModel: got false, want true")
	}
}
