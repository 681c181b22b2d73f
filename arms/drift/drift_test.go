package drift

import (
	"encoding/json"
	"fmt"
	"math"
	"os"
	"os/exec"
	"strings"
	"testing"
)

// ksCases are shared with the scipy reference below.
var ksCases = []struct {
	name string
	x, y []float64
}{
	{"Separate", []float64{1, 2, 3, 4, 5}, []float64{6, 7, 8, 9, 10}},
	{"Overlapping", []float64{12, 15, 9, 22, 18, 14, 16}, []float64{11, 19, 25, 27, 21, 24}},
	{"Same", []float64{3, 5, 8, 13}, []float64{3, 5, 8, 13}},
	{"WithTies", []float64{20, 22, 22, 25, 30, 31, 31, 40}, []float64{18, 22, 25, 26, 26, 41, 45, 50, 52, 60}},
	{"Lengths", []float64{34, 41, 38, 29, 45, 40, 36, 33, 39, 42, 37, 35}, []float64{52, 61, 48, 57, 55, 63, 50, 59, 54, 58}},
}

// TestKS2AgainstScipy compares D and the exact two-sided p-value with
// scipy.stats.ks_2samp(x, y, method="exact") from Debian's python3-scipy.
func TestKS2AgainstScipy(t *testing.T) {
	py := "/usr/bin/python3"
	if err := exec.Command(py, "-c", "import scipy.stats").Run(); err != nil {
		if os.Getenv("TRIALOGUE_REQUIRE_REFERENCE") == "1" {
			t.Fatalf("scipy is required (TRIALOGUE_REQUIRE_REFERENCE=1) but %s cannot import it: %v", py, err)
		}
		t.Skip("Debian's python3-scipy is not installed")
	}
	var cases []map[string][]float64
	for _, c := range ksCases {
		cases = append(cases, map[string][]float64{"x": c.x, "y": c.y})
	}
	in, _ := json.Marshal(cases)
	script := `
import json, sys
from scipy.stats import ks_2samp
out = []
for c in json.load(sys.stdin):
    r = ks_2samp(c["x"], c["y"], alternative="two-sided", method="exact")
    out.append([float(r.statistic), float(r.pvalue)])
print(json.dumps(out))
`
	cmd := exec.Command(py, "-c", script)
	cmd.Stdin = strings.NewReader(string(in))
	raw, err := cmd.Output()
	if err != nil {
		t.Fatalf("scipy: %v", err)
	}
	var want [][2]float64
	if err := json.Unmarshal(raw, &want); err != nil {
		t.Fatalf("scipy output %q: %v", raw, err)
	}
	for i, c := range ksCases {
		t.Run(c.name, func(t *testing.T) {
			d, p := KS2(c.x, c.y)
			if math.Abs(d-want[i][0]) > 1e-12 || math.Abs(p-want[i][1]) > 1e-9*math.Max(1, want[i][1]) {
				t.Fatalf("got D=%.12g p=%.12g, want scipy's D=%.12g p=%.12g", d, p, want[i][0], want[i][1])
			}
		})
	}
}

func TestKS2Edges(t *testing.T) {
	if d, p := KS2(nil, []float64{1}); d != 0 || p != 1 {
		t.Fatalf("empty sample: got D=%g p=%g, want 0 and 1", d, p)
	}
	// Two samples of one value each that differ: D is 1 and every ordering
	// of the pooled pair is as extreme, so p is 1 (from the definition).
	if d, p := KS2([]float64{1}, []float64{2}); d != 1 || p != 1 {
		t.Fatalf("one value each: got D=%g p=%g, want 1 and 1", d, p)
	}
}

func outputs(texts [][]string, model, fp string) []Output {
	var out []Output
	for run, turns := range texts {
		for turn, text := range turns {
			out = append(out, Output{Probe: "unsure", Arm: "debate", Run: run, Turn: turn, Text: text, ModelReported: model, Fingerprint: fp})
		}
	}
	return out
}

var script = []string{
	"Hello! What is your first impression of the cable car across the Orrin Gorge?",
	"The trip to the hospital on the east rim would take six minutes instead of forty.",
	"The bond runs for twelve years, which spreads the cost thinly.",
}

func repeat(runs int, turns []string) [][]string {
	out := make([][]string, runs)
	for i := range out {
		out[i] = turns
	}
	return out
}

func statusOf(r Report, name string) string {
	for _, c := range r.Checks {
		if c.Name == name {
			return c.Status
		}
	}
	return "absent"
}

func TestCompare(t *testing.T) {
	base := outputs(repeat(5, script), "scripted", "script-1")
	t.Run("OKUnchanged", func(t *testing.T) {
		r := Compare(base, outputs(repeat(5, script), "scripted", "script-1"), DefaultThresholds)
		if r.Status != Pass {
			t.Fatalf("got %s: %+v", r.Status, r.Checks)
		}
	})
	t.Run("ErrChangedReplies", func(t *testing.T) {
		changed := []string{
			"Good day. Tell me about your weekend plans and your garden.",
			"Tomatoes need sun, water and patience to ripen well in summer.",
			"Basil grows well beside tomatoes on a sunny windowsill.",
		}
		r := Compare(base, outputs(repeat(5, changed), "scripted", "script-2"), DefaultThresholds)
		if r.Status != Fail || statusOf(r, "exact match") != Fail || statusOf(r, "lexical similarity") != Fail {
			t.Fatalf("got %s: %+v", r.Status, r.Checks)
		}
		if !strings.Contains(r.Summary, "exact match (fail)") {
			t.Fatalf("summary does not name the failed check: %q", r.Summary)
		}
	})
	t.Run("ErrModelChanged", func(t *testing.T) {
		r := Compare(base, outputs(repeat(5, script), "scripted-2027-06", "script-1"), DefaultThresholds)
		if statusOf(r, "model reported") != Fail {
			t.Fatalf("got %+v", r.Checks)
		}
	})
	t.Run("WarnFingerprintChanged", func(t *testing.T) {
		r := Compare(base, outputs(repeat(5, script), "scripted", "script-9"), DefaultThresholds)
		if r.Status != Warn || statusOf(r, "fingerprint") != Warn {
			t.Fatalf("got %s %+v", r.Status, r.Checks)
		}
	})
	t.Run("ErrNewRefusal", func(t *testing.T) {
		refusing := append([]string(nil), script...)
		refusing[2] = "I'm sorry, but as an AI language model I can't help with persuading you."
		r := Compare(base, outputs(repeat(5, refusing), "scripted", "script-1"), DefaultThresholds)
		if statusOf(r, "refusals and role breaks") != Fail {
			t.Fatalf("got %+v", r.Checks)
		}
	})
	t.Run("ErrLongerReplies", func(t *testing.T) {
		var long [][]string
		for run := range 5 {
			var turns []string
			for _, s := range script {
				turns = append(turns, s+strings.Repeat(fmt.Sprintf(" and more words %d", run), 12))
			}
			long = append(long, turns)
		}
		r := Compare(base, outputs(long, "scripted", "script-1"), DefaultThresholds)
		if statusOf(r, "reply length") != Fail {
			t.Fatalf("got %+v", r.Checks)
		}
	})
	t.Run("ErrMissingProbeTurns", func(t *testing.T) {
		r := Compare(base, outputs(repeat(5, script[:2]), "scripted", "script-1"), DefaultThresholds)
		if statusOf(r, "probe coverage") != Fail {
			t.Fatalf("got %+v", r.Checks)
		}
	})
}

func TestCosine(t *testing.T) {
	for _, tc := range []struct {
		a, b string
		want float64
	}{
		{"the gorge bridge", "The gorge, bridge!", 1},
		{"north shore", "south field", 0},
		{"", "", 1},
		// by hand: grams a = {a:1, b:1, "a b":1}, b = {a:1, c:1, "a c":1}: dot 1, norms sqrt 3
		{"a b", "a c", 1.0 / 3},
	} {
		if got := Cosine(tc.a, tc.b); math.Abs(got-tc.want) > 1e-12 {
			t.Fatalf("Cosine(%q, %q): got %g, want %g", tc.a, tc.b, got, tc.want)
		}
	}
}
