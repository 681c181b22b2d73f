package flags_test

import (
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"trialogue/arms"
	"trialogue/arms/flags"
)

// TestFlagsBlock checks the study file's flags block as trialogue check
// reads it: a valid block is kept, a study without one keeps its version
// hash, and each mistake is reported at its line and column.
func TestFlagsBlock(t *testing.T) {
	src, err := os.ReadFile(filepath.Join(fixtures, "study-tuned.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	t.Run("OK", func(t *testing.T) {
		def, err := arms.Parse("study-tuned.yaml", src)
		if err != nil {
			t.Fatal(err)
		}
		st := flags.SettingsOf(def)
		if st.ShortWords != 2 || st.TimeLimit.Minutes() != 10 || len(st.Concede) != 2 || st.Concede[0] != "i see your point now" ||
			!st.Argue["advocate"] || st.Argue["listen"] || len(st.Reveal) != 1 || st.Reveal[0] != "town" {
			t.Fatalf("got settings %+v, want the file's block", st)
		}
	})
	t.Run("OKAbsentBlockKeepsVersionHash", func(t *testing.T) {
		plain, _, err := arms.ParseFile(filepath.Join(fixtures, "study.yaml"))
		if err != nil {
			t.Fatal(err)
		}
		c, err := plain.Canonical()
		if err != nil {
			t.Fatal(err)
		}
		if strings.Contains(string(c), `"flags"`) {
			t.Fatalf("a study without a flags block has flags in its canonical form: %s", c)
		}
		tuned, err := arms.Parse("study-tuned.yaml", src)
		if err != nil {
			t.Fatal(err)
		}
		ct, err := tuned.Canonical()
		if err != nil {
			t.Fatal(err)
		}
		if !strings.Contains(string(ct), `"flags":{"argue":["advocate"]`) {
			t.Fatalf("the tuned study's canonical form lacks its flags block: %s", ct)
		}
		back, err := arms.FromCanonical(ct)
		if err != nil {
			t.Fatalf("read the canonical form back: %v", err)
		}
		if got := flags.SettingsOf(back); got.TimeLimit != flags.SettingsOf(tuned).TimeLimit || got.ShortWords != 2 {
			t.Fatalf("got settings %+v from the canonical form, want the file's", got)
		}
	})
	block := "flags:\n  concede: [\"I see your point now\", \"let us leave it there\"]\n  argue: [advocate]\n  reveal: [town]\n  short_words: 2\n  time_limit: 10m\n"
	if !strings.Contains(string(src), block) {
		t.Fatalf("study-tuned.yaml no longer holds the block this test edits")
	}
	line := strings.Count(string(src[:strings.Index(string(src), block)]), "\n") + 1 // the line of "flags:"
	for _, c := range []struct {
		name, block, want string
		line, col         int
	}{
		{"ErrUnknownArm", "flags:\n  argue: [advocate, debate]\n", `flags.argue names arm "debate", which is not declared under arms`, line + 1, 21},
		{"ErrFixedArmArgues", "flags:\n  argue: [notice]\n", `flags.argue names arm "notice", a fixed text`, line + 1, 11},
		{"ErrUnknownCovariate", "flags:\n  reveal: [town, shoe_size]\n", `flags.reveal names "shoe_size", which is not a declared covariate`, line + 1, 18},
		{"ErrEmptyPhrase", "flags:\n  concede: [\"...\"]\n", `concede phrase "..." has no words`, line + 1, 13},
		{"ErrRepeatedPhrase", "flags:\n  concede: [\"Fair enough then\", \"fair  enough then\"]\n", `concede phrase "fair  enough then" is listed twice`, line + 1, 33},
		{"ErrShortWordsTooMany", "flags:\n  short_words: 99\n", "short_words must be between 1 and 50 (got 99)", line + 1, 16},
		{"ErrTimeLimitTooShort", "flags:\n  time_limit: 10s\n", "time_limit must be between 1m and 168h (got 10s)", line + 1, 15},
		// Durations the YAML reader cannot read carry no position (1:1), as
		// for every duration field of a study file; the message names the value.
		{"ErrTimeLimitNotADuration", "flags:\n  time_limit: soon\n", `"soon" is not a duration`, 1, 1},
		{"ErrUnknownField", "flags:\n  concede_phrases: [\"fine\"]\n", "unknown field \"concede_phrases\"", line + 1, 3},
	} {
		t.Run(c.name, func(t *testing.T) {
			bad := strings.Replace(string(src), block, c.block, 1)
			def, err := arms.Parse("study-tuned.yaml", []byte(bad))
			var probs *arms.Problems
			if !errors.As(err, &probs) {
				t.Fatalf("got %v (study %v), want problems", err, def != nil)
			}
			for _, p := range probs.List {
				if strings.Contains(p.Msg, c.want) {
					if p.Line != c.line || p.Col != c.col {
						t.Fatalf("got %q at %d:%d, want %d:%d", p.Msg, p.Line, p.Col, c.line, c.col)
					}
					return
				}
			}
			t.Fatalf("got %v, want a problem containing %q", err, c.want)
		})
	}
}
