package flags_test

import (
	"os"
	"path/filepath"
	"slices"
	"strings"
	"testing"
	"time"

	"github.com/goccy/go-yaml"

	"trialogue/arms"
	"trialogue/arms/flags"
)

const fixtures = "../../testdata/flags"

// fixture is one file of hand-written transcripts (see testdata/flags/README.md).
type fixture struct {
	Study    string `yaml:"study"`
	Sessions []struct {
		Name       string                 `yaml:"name"`
		Arm        string                 `yaml:"arm"`
		Covariates map[string]arms.Scalar `yaml:"covariates"`
		Finished   arms.Duration          `yaml:"finished"`
		Failures   []struct {
			At       arms.Duration `yaml:"at"`
			Kind     string        `yaml:"kind"`
			Attempts int           `yaml:"attempts"`
		} `yaml:"failures"`
		Turns []struct {
			Reply     string        `yaml:"reply"`
			Model     string        `yaml:"model"`
			At        arms.Duration `yaml:"at"`
			LatencyMS int64         `yaml:"latency_ms"`
			Retries   int           `yaml:"retries"`
			Typing    *struct {
				TypingMS    int64 `yaml:"typing_ms"`
				Keystrokes  int64 `yaml:"keystrokes"`
				Pastes      int64 `yaml:"pastes"`
				HiddenCount int64 `yaml:"hidden_count"`
			} `yaml:"typing"`
		} `yaml:"turns"`
		Want map[string]string `yaml:"want"`
	} `yaml:"sessions"`
}

// entered is when every fixture session entered; turn times are offsets.
var entered = time.Date(2027, 3, 1, 9, 0, 0, 0, time.UTC)

func loadStudy(t testing.TB, name string) *arms.Study {
	t.Helper()
	def, _, err := arms.ParseFile(filepath.Join(fixtures, name))
	if err != nil {
		t.Fatalf("study %s: %v", name, err)
	}
	return def
}

// TestFixtures computes the flags of every hand-written transcript in
// testdata/flags and compares them with the flags the file says it must
// raise: each flag's positive cases and its near-misses.
func TestFixtures(t *testing.T) {
	files, err := filepath.Glob(filepath.Join(fixtures, "*.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	seen := map[string]bool{} // flag codes some fixture raises
	nearMisses := 0
	for _, path := range files {
		if strings.HasPrefix(filepath.Base(path), "study") {
			continue
		}
		b, err := os.ReadFile(path)
		if err != nil {
			t.Fatal(err)
		}
		var fx fixture
		if err := yaml.UnmarshalWithOptions(b, &fx, yaml.DisallowUnknownField()); err != nil {
			t.Fatalf("%s: %v", path, err)
		}
		def := loadStudy(t, fx.Study)
		for _, sc := range fx.Sessions {
			t.Run(strings.TrimSuffix(filepath.Base(path), ".yaml")+"/"+sc.Name, func(t *testing.T) {
				if _, ok := def.Arms[sc.Arm]; !ok {
					t.Fatalf("fixture names arm %q, which %s lacks", sc.Arm, fx.Study)
				}
				s := flags.Session{Arm: sc.Arm, Covariates: map[string]string{}, Entered: entered}
				for k, v := range sc.Covariates {
					s.Covariates[k] = string(v)
				}
				if sc.Finished > 0 {
					s.Finished = entered.Add(time.Duration(sc.Finished))
				}
				for _, f := range sc.Failures {
					s.Failures = append(s.Failures, flags.Failure{At: entered.Add(time.Duration(f.At)), Kind: f.Kind, Attempts: f.Attempts})
				}
				for i, tu := range sc.Turns {
					at := entered.Add(time.Duration(tu.At))
					turn := flags.Turn{Role: flags.RoleRespondent, Text: tu.Reply, StartedAt: at, CreatedAt: at}
					if tu.Model != "" {
						turn = flags.Turn{Role: flags.RoleAssistant, Text: tu.Model, StartedAt: at.Add(-time.Duration(tu.LatencyMS) * time.Millisecond),
							CreatedAt: at, LatencyMS: tu.LatencyMS, Retries: tu.Retries}
					}
					if (tu.Model == "") == (tu.Reply == "") {
						t.Fatalf("turn %d has both or neither of reply and model", i+1)
					}
					if tu.Typing != nil {
						turn.Typing = &flags.Typing{TypingMS: tu.Typing.TypingMS, Keystrokes: tu.Typing.Keystrokes, Pastes: tu.Typing.Pastes, HiddenCount: tu.Typing.HiddenCount}
					}
					s.Turns = append(s.Turns, turn)
				}
				got := flags.Compute(def, s)
				var gotCodes, wantCodes []string
				for _, f := range got {
					gotCodes = append(gotCodes, f.Code)
					seen[f.Code] = true
				}
				for code := range sc.Want {
					wantCodes = append(wantCodes, code)
				}
				slices.SortFunc(wantCodes, func(a, b string) int { return slices.Index(flags.Codes, a) - slices.Index(flags.Codes, b) })
				if !slices.Equal(gotCodes, wantCodes) {
					t.Fatalf("got flags %v (%+v), want %v", gotCodes, got, wantCodes)
				}
				for _, f := range got {
					if !strings.Contains(f.Reason, sc.Want[f.Code]) {
						t.Fatalf("flag %s: got reason %q, want it to contain %q", f.Code, f.Reason, sc.Want[f.Code])
					}
					if strings.Contains(f.Reason, "\n") || f.Reason == "" {
						t.Fatalf("flag %s: got reason %q, want one non-empty line", f.Code, f.Reason)
					}
				}
				if len(wantCodes) == 0 {
					nearMisses++
				}
			})
		}
	}
	// Every flag must be exercised by some fixture, and near-misses must exist.
	for _, code := range flags.Codes {
		if !seen[code] {
			t.Errorf("no fixture raises flag %q", code)
		}
	}
	if nearMisses < len(flags.Codes) {
		t.Errorf("got %d near-miss transcripts, want at least one per flag (%d)", nearMisses, len(flags.Codes))
	}
}

// TestReasonsQuoteNoRespondentText checks that a reason never repeats what
// a respondent wrote: reasons are shown in lists and logs where transcripts
// are not.
func TestReasonsQuoteNoRespondentText(t *testing.T) {
	def := loadStudy(t, "study.yaml")
	secret := "my neighbour Ilse Varga at the corner shop"
	s := flags.Session{Arm: "advocate", Covariates: map[string]string{"age": "40", "party": "civic", "stance": "favour"}, Entered: entered,
		Finished: entered.Add(time.Hour)}
	for i := range 3 {
		at := entered.Add(time.Duration(i+1) * time.Second)
		s.Turns = append(s.Turns,
			flags.Turn{Role: flags.RoleRespondent, Text: secret, CreatedAt: at, Typing: &flags.Typing{TypingMS: 10, Pastes: 1}},
			flags.Turn{Role: flags.RoleAssistant, Text: "As an AI I can't help. You're right.", CreatedAt: at, Retries: 1})
	}
	got := flags.Compute(def, s)
	if len(got) < 5 {
		t.Fatalf("got %d flags (%+v), want at least 5", len(got), got)
	}
	for _, f := range got {
		if strings.Contains(strings.ToLower(f.Reason), "ilse") || strings.Contains(f.Reason, "corner shop") {
			t.Fatalf("flag %s: reason %q quotes the respondent", f.Code, f.Reason)
		}
	}
}

func TestDescribe(t *testing.T) {
	t.Run("OKDefaults", func(t *testing.T) {
		d := flags.Describe(loadStudy(t, "study.yaml"))
		if len(d) != len(flags.Codes) {
			t.Fatalf("got %d definitions, want %d", len(d), len(flags.Codes))
		}
		for i, def := range d {
			if def.Code != flags.Codes[i] || def.Meaning == "" {
				t.Fatalf("definition %d: got %+v, want code %s with a meaning", i, def, flags.Codes[i])
			}
		}
		for code, want := range map[string]string{
			flags.Conceded:   "(advocate, listen)",
			flags.Revealed:   "(age, party, stance, town)",
			flags.Satisficed: "under 4 words",
			flags.Overtime:   "more than 30m passed",
		} {
			if got := d[slices.Index(flags.Codes, code)].Meaning; !strings.Contains(got, want) {
				t.Fatalf("%s: got %q, want it to contain %q", code, got, want)
			}
		}
	})
	t.Run("OKTuned", func(t *testing.T) {
		d := flags.Describe(loadStudy(t, "study-tuned.yaml"))
		for code, want := range map[string]string{
			flags.Conceded:   "(advocate), a model message uses a phrase of giving up that side (2 phrases)",
			flags.Revealed:   "(town)",
			flags.Satisficed: "under 2 words",
			flags.Overtime:   "more than 10m passed",
		} {
			if got := d[slices.Index(flags.Codes, code)].Meaning; !strings.Contains(got, want) {
				t.Fatalf("%s: got %q, want it to contain %q", code, got, want)
			}
		}
	})
}

func TestTypingCheck(t *testing.T) {
	t.Run("OK", func(t *testing.T) {
		for _, ty := range []flags.Typing{{}, {TypingMS: 5300, Keystrokes: 41, Pastes: 1, HiddenCount: 2},
			{TypingMS: flags.MaxTypingMS, Keystrokes: flags.MaxKeystrokes, Pastes: flags.MaxPastes, HiddenCount: flags.MaxHiddenCount}} {
			if err := ty.Check(); err != nil {
				t.Fatalf("%+v: got %v, want no error", ty, err)
			}
		}
	})
	for _, c := range []struct {
		name  string
		ty    flags.Typing
		field string
	}{
		{"ErrNegativeTime", flags.Typing{TypingMS: -1}, "typing.typing_ms"},
		{"ErrTimeOverADay", flags.Typing{TypingMS: flags.MaxTypingMS + 1}, "typing.typing_ms"},
		{"ErrNegativeKeystrokes", flags.Typing{Keystrokes: -5}, "typing.keystrokes"},
		{"ErrTooManyPastes", flags.Typing{Pastes: flags.MaxPastes + 1}, "typing.pastes"},
		{"ErrNegativeHidden", flags.Typing{HiddenCount: -2}, "typing.hidden_count"},
	} {
		t.Run(c.name, func(t *testing.T) {
			err := c.ty.Check()
			fe, ok := err.(*flags.FieldError)
			if !ok || fe.Field != c.field {
				t.Fatalf("got %v, want a field error on %s", err, c.field)
			}
		})
	}
}
