package server

import (
	"math"
	"slices"
	"strings"
	"testing"
	"time"

	"trialogue/store"
)

func TestMedianAndPercentile(t *testing.T) {
	ints := func(lo, hi int64) []int64 {
		var v []int64
		for i := lo; i <= hi; i++ {
			v = append(v, i)
		}
		return v
	}
	// The nearest-rank percentile is the value at rank ⌈p/100 · n⌉ (the
	// definition, from memory); the median of an even count is the mean of
	// the middle two, here rounded down to the millisecond.
	for _, c := range []struct {
		name        string
		v           []int64
		median, p95 int64
	}{
		{"OKEmpty", nil, 0, 0},
		{"OKOne", []int64{7}, 7, 7},
		{"OKEven", []int64{100, 200, 300, 400}, 250, 400},
		{"OKOdd", []int64{100, 200, 900}, 200, 900},
		{"OKTwenty", ints(1, 20), 10, 19},
		{"OKHundred", ints(1, 100), 50, 95},
	} {
		t.Run(c.name, func(t *testing.T) {
			if got := median(c.v); got != c.median {
				t.Errorf("median: got %d, want %d", got, c.median)
			}
			if got := nearestRank(c.v, 95); got != c.p95 {
				t.Errorf("95th percentile: got %d, want %d", got, c.p95)
			}
		})
	}
}

func TestDropoutTest(t *testing.T) {
	t.Run("OKDiffers", func(t *testing.T) {
		// Dropped/completed 10/30 and 25/15: expected 17.5 and 22.5 in each
		// row, so χ² = 2·7.5²/17.5 + 2·7.5²/22.5 = 80/7 ≈ 11.4286 with 1
		// degree of freedom; for 1 df the survival function is
		// erfc(√(χ²/2)) (χ² with 1 df is a squared standard normal), ≈ 0.000723.
		got := dropoutTest([]MonitorArm{{Dropped: 10, Completed: 30}, {Dropped: 25, Completed: 15}})
		wantP := math.Erfc(math.Sqrt(80.0 / 7 / 2))
		if !got.Done || got.DF != 1 || math.Abs(got.Stat-80.0/7) > 1e-9 || math.Abs(got.P-wantP) > 1e-9 || !got.Differs {
			t.Errorf("got %+v, want χ² %.6f, df 1, p %.6f, differs", got, 80.0/7, wantP)
		}
		if strings.Contains(got.Note, "below 5") {
			t.Errorf("got note %q, want no small-count warning", got.Note)
		}
	})
	t.Run("OKSame", func(t *testing.T) {
		got := dropoutTest([]MonitorArm{{Dropped: 10, Completed: 30}, {Dropped: 10, Completed: 30}, {Assigned: 3}})
		if !got.Done || got.Stat != 0 || got.P != 1 || got.Differs {
			t.Errorf("got %+v, want χ² 0, p 1, no difference (the arm without outcomes left out)", got)
		}
	})
	t.Run("OKSmallCounts", func(t *testing.T) {
		got := dropoutTest([]MonitorArm{{Dropped: 1, Completed: 2}, {Dropped: 2, Completed: 1}})
		if !got.Done || !strings.Contains(got.Note, "below 5") {
			t.Errorf("got %+v, want a test with a small-count warning", got)
		}
	})
	t.Run("ErrOneArm", func(t *testing.T) {
		if got := dropoutTest([]MonitorArm{{Dropped: 4, Completed: 9}}); got.Done || got.Note == "" {
			t.Errorf("got %+v, want no test and a note", got)
		}
	})
}

func TestEntryBuckets(t *testing.T) {
	t0 := time.Date(2027, 6, 1, 10, 2, 0, 0, time.UTC)
	at := func(d time.Duration) store.MonitorSession { return store.MonitorSession{CreatedAt: t0.Add(d)} }
	t.Run("OKFiveMinutes", func(t *testing.T) {
		start, width, counts := entryBuckets([]store.MonitorSession{at(0), at(2 * time.Minute), at(61 * time.Minute)}, t0.Add(2*time.Hour))
		// Two hours in 1-minute bars would be 121 bars, more than 48; in
		// 5-minute bars from 10:00, 25.
		if width != 5*time.Minute || !start.Equal(time.Date(2027, 6, 1, 10, 0, 0, 0, time.UTC)) || len(counts) != 25 || counts[0] != 2 || counts[12] != 1 {
			t.Errorf("got start %s, width %s, %d bars %v; want 10:00, 5m, 25 bars with 2 in the first and 1 in the 13th", start, width, len(counts), counts)
		}
	})
	t.Run("OKNone", func(t *testing.T) {
		if _, _, counts := entryBuckets(nil, t0); counts != nil {
			t.Errorf("got %v, want no bars", counts)
		}
		if !strings.Contains(string(entriesSVG(nil, t0)), "No entries yet.") {
			t.Error("the empty chart does not say so")
		}
	})
}

func TestSafeNext(t *testing.T) {
	for _, c := range []struct{ in, want string }{
		{"/console/studies/x/monitor?cohort=main", "/console/studies/x/monitor?cohort=main"},
		{"", "/console/studies"},
		{"https://elsewhere.example/console/", "/console/studies"},
		{"//elsewhere.example/console/", "/console/studies"},
		{"/console/../s/x", "/console/studies"},
		{`/console\studies`, "/console/studies"},
		{"/console/login", "/console/studies"},
		{"/c/token", "/console/studies"},
	} {
		if got := safeNext(c.in); got != c.want {
			t.Errorf("safeNext(%q): got %q, want %q", c.in, got, c.want)
		}
	}
}

func TestLoginWait(t *testing.T) {
	now := time.Date(2027, 6, 1, 10, 0, 0, 0, time.UTC)
	var got []time.Duration
	for _, n := range []int{0, 4, 5, 6, 8, 14, 15, 100} {
		got = append(got, loginWait(store.Failures{N: n, Last: now}, 5, now))
	}
	want := []time.Duration{0, 0, time.Second, 2 * time.Second, 8 * time.Second, 512 * time.Second, loginMaxWait, loginMaxWait}
	if !slices.Equal(got, want) {
		t.Errorf("got %v, want %v", got, want)
	}
	if w := loginWait(store.Failures{N: 6, Last: now}, 5, now.Add(5*time.Second)); w != 0 {
		t.Errorf("after the wait: got %s, want 0", w)
	}
}

func TestSpan(t *testing.T) {
	for d, want := range map[time.Duration]string{time.Minute: "1 minute", 5 * time.Minute: "5 minutes", time.Hour: "1 hour",
		24 * time.Hour: "1 day", 7 * 24 * time.Hour: "1 week", 90 * time.Second: "90 seconds", 0: "no time"} {
		if got := span(d); got != want {
			t.Errorf("span(%s): got %q, want %q", d, got, want)
		}
	}
}
