package flags_test

import (
	"strings"
	"testing"
	"time"

	"trialogue/arms/flags"
)

// FuzzCompute feeds arbitrary model and respondent text, and covariate
// values, to every rule: Compute must not panic, and every reason must be
// one non-empty line that quotes no respondent text longer than a word.
func FuzzCompute(f *testing.F) {
	for _, seed := range [][3]string{
		{"You're right. But 47,000 readers?", "I am 47 and live in Hollin Vale.", "Hollin Vale"},
		{"As an AI, I can't help. I'm a real person.", "ok", "47"},
		{"4.47 1947 47, 47.", "47", "4"},
		{"ʼyou’re right’", "", "é"},
		{"...", "....", "."},
		{"greens greenspace GREENS", "repeat repeat", "greens"},
		{"\xff\xfe", "\u0661\u0662", "\u0661"},
	} {
		f.Add(seed[0], seed[1], seed[2])
	}
	def := loadStudy(f, "study.yaml")
	f.Fuzz(func(t *testing.T, model, reply, town string) {
		at := entered
		s := flags.Session{Arm: "advocate", Covariates: map[string]string{"age": "47", "party": "greens", "stance": "favour", "town": town}, Entered: at}
		for i := range 3 {
			at = at.Add(time.Duration(i) * time.Second)
			s.Turns = append(s.Turns,
				flags.Turn{Role: flags.RoleRespondent, Text: reply, CreatedAt: at, Typing: &flags.Typing{TypingMS: int64(i) * 100, Pastes: int64(i % 2)}},
				flags.Turn{Role: flags.RoleAssistant, Text: model, CreatedAt: at, Retries: i})
		}
		for _, fl := range flags.Compute(def, s) {
			if fl.Reason == "" || strings.Contains(fl.Reason, "\n") {
				t.Fatalf("flag %s: got reason %q, want one non-empty line", fl.Code, fl.Reason)
			}
			if fl.Code == flags.Satisficed || fl.Code == flags.Pasted {
				if long := strings.TrimSpace(reply); len(long) > 20 && strings.Contains(fl.Reason, long) {
					t.Fatalf("flag %s: reason %q quotes the reply", fl.Code, fl.Reason)
				}
			}
		}
	})
}
