package arms

import (
	"slices"
	"strings"
	"testing"
	"time"
)

// withFielding is the minimal fixture with a fielding block after it; the
// block starts on line 23.
func withFielding(tb testing.TB, block string) []byte {
	tb.Helper()
	src := string(mustRead(tb, studiesDir+"/minimal.yaml"))
	if n := strings.Count(src, "\n"); n != 22 {
		tb.Fatalf("minimal.yaml has %d lines, the positions below assume 22", n)
	}
	return []byte(src + block)
}

func TestFielding(t *testing.T) {
	t.Run("OKDefaults", func(t *testing.T) {
		s, err := Parse("minimal.yaml", mustRead(t, studiesDir+"/minimal.yaml"))
		if err != nil {
			t.Fatal(err)
		}
		if s.Fielding != nil {
			t.Errorf("got a fielding block %+v, want none: an absent block must leave the canonical form alone", s.Fielding)
		}
		if s.PilotCap() != 50 || s.PilotReviews() != 5 || s.DropoutAfter() != 30*time.Minute || s.CloseGrace() != time.Hour {
			t.Errorf("got cap %d, reviews %d, dropout %s, grace %s; want 50, 5, 30m, 1h",
				s.PilotCap(), s.PilotReviews(), s.DropoutAfter(), s.CloseGrace())
		}
		if _, ok := s.PriceOf("offline"); ok {
			t.Error("got a price for offline, want none")
		}
	})
	t.Run("OKSet", func(t *testing.T) {
		s, err := Parse("f.yaml", withFielding(t, `fielding:
  pilot_cap: 12
  pilot_reviews: 12
  consent: "You agree to take part."
  debriefing: "Thank you."
  ai_disclosure: debriefing
  dropout_after: 45m
  close_grace: 0s
  prices: {offline: {input: 0.25, output: 1}}
  currency: EUR
`))
		if err != nil {
			t.Fatal(err)
		}
		p, ok := s.PriceOf("offline")
		if s.PilotCap() != 12 || s.PilotReviews() != 12 || s.DropoutAfter() != 45*time.Minute || s.CloseGrace() != 0 || !ok || p != (Price{0.25, 1}) {
			t.Errorf("got cap %d, reviews %d, dropout %s, grace %s, price %+v %v; want 12, 12, 45m, 0s, {0.25 1} true",
				s.PilotCap(), s.PilotReviews(), s.DropoutAfter(), s.CloseGrace(), p, ok)
		}
	})
	t.Run("OKSmallCapLowersDefaultReviews", func(t *testing.T) {
		s, err := Parse("f.yaml", withFielding(t, "fielding: {pilot_cap: 3}\n"))
		if err != nil {
			t.Fatal(err)
		}
		if got := s.PilotReviews(); got != 3 {
			t.Errorf("got %d reviews, want 3 (the default 5 capped by pilot_cap)", got)
		}
	})
	t.Run("ErrValues", func(t *testing.T) {
		_, err := Parse("f.yaml", withFielding(t, `fielding:
  pilot_cap: -1
  pilot_reviews: -2
  ai_disclosure: later
  dropout_after: 10s
  close_grace: 200h
  prices:
    hosted: {input: 1, output: 1}
    offline: {input: -1, output: .nan}
  currency: euro
`))
		checkProblems(t, err, []want{
			{24, 14, "pilot_cap must be between 1 and 10000"},
			{25, 18, "pilot_reviews must be at least 1"},
			{26, 18, `ai_disclosure must be "page"`},
			{27, 18, "dropout_after must be between 1m and 168h"},
			{28, 16, "close_grace must be at most 168h"},
			{30, 5, `prices names endpoint "hosted", which is not declared`},
			{31, 22, "the input price of \"offline\" must be between 0 and 1000000"},
			{31, 34, "the output price of \"offline\" must be between 0 and 1000000"},
			{32, 13, "currency must be a three-letter ISO 4217 code"},
		})
	})
	t.Run("ErrMoreReviewsThanCap", func(t *testing.T) {
		_, err := Parse("f.yaml", withFielding(t, "fielding:\n  pilot_cap: 4\n  pilot_reviews: 5\n"))
		checkProblems(t, err, []want{{25, 18, "pilot_reviews (5) is more than a pilot takes (pilot_cap 4)"}})
	})
	t.Run("ErrPageDisclosureWithEmptyText", func(t *testing.T) {
		_, err := Parse("f.yaml", withFielding(t, "fielding: {ai_disclosure: page}\ntexts: {disclosure: \"\"}\n"))
		checkProblems(t, err, []want{{24, 21, "texts.disclosure is empty"}})
	})
	t.Run("ErrUnknownField", func(t *testing.T) {
		_, err := Parse("f.yaml", withFielding(t, "fielding:\n  pilot_size: 10\n"))
		checkProblems(t, err, []want{{24, 3, "unknown field"}})
	})
}

func TestFrozenChanges(t *testing.T) {
	base := string(mustRead(t, demoPath))
	live, err := Parse("demo", []byte(base))
	if err != nil {
		t.Fatal(err)
	}
	cases := []struct {
		name  string
		pairs []string
		want  []string // the paths reported, in order; nil: none
	}{
		{"OKPageTextsAndFielding", []string{"intro: \"In this part", "intro: \"Now, in this part", "pilot_reviews: 3", "pilot_reviews: 4"}, nil},
		{"OKTimeoutAndDelay", []string{"timeout: 45s", "timeout: 30s", "delay: 600ms", "delay: 0s"}, nil},
		{"ErrSystemPrompt", []string{"politely and with facts", "firmly and with facts"}, []string{"arms.debate.system"}},
		{"ErrReplyLimits", []string{"replies: {min: 3, max: 5, min_words: 2, max_chars: 1500}", "replies: {min: 2, max: 5, min_words: 2, max_chars: 1500}"}, []string{"arms.debate.replies"}},
		{"ErrModelName", []string{"model: example-chat-2027-01", "model: example-chat-2027-06", "endpoint: offline\n    opening: true", "endpoint: hosted\n    opening: true"},
			[]string{"arms.debate.endpoint"}},
		{"ErrAllocation", []string{"blocks: [6, 12]", "blocks: [6]"}, []string{"allocation"}},
		{"ErrFixedText", []string{"A vote is planned", "A ballot is planned"}, []string{"arms.notice.text"}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			next, err := Parse("next", []byte(edit(t, base, c.pairs...)))
			if err != nil {
				t.Fatal(err)
			}
			var got []string
			for _, ch := range live.FrozenChanges(next) {
				path, _, _ := strings.Cut(ch, ":")
				got = append(got, path)
			}
			if !slices.Equal(got, c.want) {
				t.Errorf("got %q, want %q", got, c.want)
			}
		})
	}
	t.Run("ErrModelOfUsedEndpoint", func(t *testing.T) {
		// Point the debate at the hosted endpoint in both versions, then
		// change the hosted model: the change reaches a live arm.
		onHosted := edit(t, base, "endpoint: offline\n    opening: true", "endpoint: hosted\n    opening: true")
		a, err := Parse("a", []byte(onHosted))
		if err != nil {
			t.Fatal(err)
		}
		b, err := Parse("b", []byte(edit(t, onHosted, "model: example-chat-2027-01", "model: example-chat-2027-06", "temperature: 0.7", "temperature: 0.2")))
		if err != nil {
			t.Fatal(err)
		}
		got := a.FrozenChanges(b)
		want := []string{"endpoints.hosted.model: changed", "endpoints.hosted.temperature: changed"}
		if !slices.Equal(got, want) {
			t.Errorf("got %q, want %q", got, want)
		}
	})
}
