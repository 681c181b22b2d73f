package textmap

import (
	"bytes"
	"encoding/json"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"os/exec"
	"slices"
	"strings"
	"testing"

	"gonum.org/v1/gonum/mat"
)

// corpus is a small fictional corpus in three arms, with accents, a
// combining mark, digits, underscores, apostrophes and one-letter words.
func corpus() ([]string, []int) {
	arms := [][]string{
		{"The Quillhaven cable car links the mill quarter with the hospital.",
			"A cable car would cut the hospital trip from 40 minutes to 6.",
			"Vote for the cable car: quiet, quick and no new roads!",
			"Nurses and patients would ride the cable car every day.",
			"The twelve-year bond spreads the cable car's cost thinly.",
			"Support the gorge cable car at next spring's vote.",
			"Le téléphérique de Quillhaven relie l'hôpital au quartier du moulin.",
			"Cable car cabins run every 4 minutes, said the council_report."},
		{"What matters most to you when the town spends money?",
			"Who would use the cable car most, and who might lose out?",
			"How would you like getting around the gorge to look?",
			"Is there a question you would want the council to answer?",
			"What would make you more comfortable with the project?",
			"Think about the next ten years: what do you hope for?",
			"Which trips do you make most often in a week?"},
		{"Do you grow anything at home, even a pot of herbs?",
			"What do you enjoy most about gardening on a Saturday?",
			"Tomatoes and basil grow well on a sunny windowsill.",
			"A cafe\u0301 garden club meets on weekends in spring.",
			"Naïve gardeners over-water their ferns; I did too.",
			"Weekend hobbies: knitting, hiking and a bit of baking.",
			"My neighbour's roses bloomed twice this year, in June and September."},
	}
	var texts []string
	var labels []int
	for a, msgs := range arms {
		for _, m := range msgs {
			texts = append(texts, m)
			labels = append(labels, a)
		}
	}
	return texts, labels
}

func needSklearn(t *testing.T) string {
	t.Helper()
	python, err := exec.LookPath("/usr/bin/python3")
	if err == nil {
		err = exec.Command(python, "-c", "import sklearn").Run()
	}
	if err != nil {
		if os.Getenv("TRIALOGUE_REQUIRE_REFERENCE") != "" {
			t.Fatalf("Debian's python3-sklearn is required (TRIALOGUE_REQUIRE_REFERENCE is set): %v", err)
		}
		t.Skipf("Debian's python3-sklearn is not installed; install it or set TRIALOGUE_REQUIRE_REFERENCE to fail instead")
	}
	return python
}

// TestMatchesScikitLearn compares the TF-IDF values (to 1e-9), the SVD's
// singular values and coordinates (to 1e-6) and the nearest-centroid
// cross-validated predictions (exactly) to scikit-learn's TfidfVectorizer,
// TruncatedSVD (arpack) and NearestCentroid on the same folds.
func TestMatchesScikitLearn(t *testing.T) {
	python := needSklearn(t)
	texts, labels := corpus()
	folds := Folds(len(texts), 5, 3)
	req, _ := json.Marshal(map[string]any{"texts": texts, "labels": labels, "folds": folds})
	cmd := exec.Command(python, "../../../testdata/analysis/sklearn_textmap.py")
	cmd.Stdin = bytes.NewReader(req)
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("sklearn_textmap.py: %v", err)
	}
	var ref struct {
		Vocabulary []string
		IDF        []float64
		TFIDF      [][]float64
		Singular   []float64
		Coords     [][]float64
		Pred       []int
	}
	if err := json.Unmarshal(out, &ref); err != nil {
		t.Fatal(err)
	}
	m := TFIDF(texts)
	t.Run("OKVocabulary", func(t *testing.T) {
		if !slices.Equal(m.Vocabulary, ref.Vocabulary) {
			t.Fatalf("got vocabulary %q, want %q (scikit-learn)", m.Vocabulary, ref.Vocabulary)
		}
	})
	t.Run("OKTFIDF", func(t *testing.T) {
		d := m.Dense()
		for i := range ref.TFIDF {
			for j, want := range ref.TFIDF[i] {
				if got := d.At(i, j); math.Abs(got-want) > 1e-9 {
					t.Fatalf("tfidf[%d][%q]: got %.15g, want %.15g (scikit-learn)", i, ref.Vocabulary[j], got, want)
				}
			}
		}
		for j, want := range ref.IDF {
			if math.Abs(m.IDF[j]-want) > 1e-9 {
				t.Errorf("idf %q: got %.15g, want %.15g", ref.Vocabulary[j], m.IDF[j], want)
			}
		}
	})
	t.Run("OKTruncatedSVD", func(t *testing.T) {
		svd, err := TruncatedSVD(m, 2, 1)
		if err != nil {
			t.Fatal(err)
		}
		for c := range 2 {
			if math.Abs(svd.Values[c]-ref.Singular[c]) > 1e-6 {
				t.Errorf("singular value %d: got %.12g, want %.12g (scikit-learn)", c, svd.Values[c], ref.Singular[c])
			}
			for i := range ref.Coords {
				if math.Abs(svd.Coords[i][c]-ref.Coords[i][c]) > 1e-6 {
					t.Fatalf("coordinate %d of message %d: got %.9g, want %.9g (scikit-learn)", c, i, svd.Coords[i][c], ref.Coords[i][c])
				}
			}
		}
	})
	t.Run("OKNearestCentroidCV", func(t *testing.T) {
		cl := newClassifier(m, folds, 5, 3)
		pred := make([]int, len(texts))
		acc := cl.accuracy(labels, pred, cl.work())
		if !slices.Equal(pred, ref.Pred) {
			t.Fatalf("got predictions %v, want %v (scikit-learn)", pred, ref.Pred)
		}
		correct := 0
		for i := range pred {
			if pred[i] == labels[i] {
				correct++
			}
		}
		if acc != float64(correct)/float64(len(pred)) {
			t.Errorf("accuracy: got %v, want %v", acc, float64(correct)/float64(len(pred)))
		}
	})
}

// TestRandomizedSVD holds the randomized path, used above DenseLimit, to
// the exact singular values on a corpus just over the limit.
func TestRandomizedSVD(t *testing.T) {
	texts := synthetic(7000, 9)
	m := TFIDF(texts)
	if len(m.Rows)*len(m.Vocabulary) <= DenseLimit {
		t.Fatalf("corpus of %d × %d is not over DenseLimit", len(m.Rows), len(m.Vocabulary))
	}
	got, err := TruncatedSVD(m, 2, 1)
	if err != nil {
		t.Fatal(err)
	}
	exact := exactTop(t, m)
	for c := range 2 {
		if math.Abs(got.Values[c]-exact[c]) > 1e-6*exact[c] {
			t.Errorf("singular value %d: got %.12g, want %.12g (eigenvalues of XᵀX)", c, got.Values[c], exact[c])
		}
	}
}

func TestTokens(t *testing.T) {
	// scikit-learn's default token pattern (?u)\b\w\w+\b, common practice.
	cases := []struct {
		in   string
		want []string
	}{
		{"OK: It's a 2-car TRAIN_line, x y z!", []string{"ok", "it", "car", "train_line"}},
		{"Café naïve e\u0301t 42 ß", []string{"café", "naïve", "42"}},
		{"", nil},
	}
	for _, c := range cases {
		if got := Tokens(c.in); !slices.Equal(got, c.want) {
			t.Errorf("Tokens(%q): got %q, want %q", c.in, got, c.want)
		}
	}
}

func TestBuild(t *testing.T) {
	texts, labels := corpus()
	names := []string{"letter", "reflect", "chit-chat"}
	var docs []Doc
	for i, tx := range texts {
		docs = append(docs, Doc{Arm: names[labels[i]], Text: tx})
	}
	t.Run("OKDistinctArms", func(t *testing.T) {
		res, err := Build(docs, append([]string{"notice"}, names...), Options{Permutations: 199, Seed: 4})
		if err != nil {
			t.Fatal(err)
		}
		if !slices.Equal(res.Arms, names) {
			t.Errorf("arms: got %v, want %v (notice has no messages)", res.Arms, names)
		}
		if res.Accuracy <= res.Chance {
			t.Errorf("accuracy %v is not above chance %v on clearly different arms", res.Accuracy, res.Chance)
		}
		if res.P > 0.05 {
			t.Errorf("permutation p %v, want at most 0.05 on clearly different arms", res.P)
		}
		if res.Distances[0][0] > 1e-12 || res.Distances[0][2] <= res.Distances[0][1]*0 {
			t.Errorf("distances: got %v", res.Distances)
		}
		if top := res.Top[0][0].Term; top != "car" && top != "cable" {
			t.Errorf("letter's top term: got %q, want cable or car", top)
		}
	})
	t.Run("OKSameArmsChance", func(t *testing.T) {
		// Labels shuffled at random carry no signal: the permutation p-value
		// is not small (with this seed).
		shuffled := slices.Clone(docs)
		rng := rand.New(rand.NewPCG(8, 8))
		rng.Shuffle(len(shuffled), func(i, j int) { shuffled[i].Arm, shuffled[j].Arm = shuffled[j].Arm, shuffled[i].Arm })
		res, err := Build(shuffled, names, Options{Permutations: 199, Seed: 4})
		if err != nil {
			t.Fatal(err)
		}
		if res.P < 0.05 {
			t.Errorf("permutation p %v on random labels, want above 0.05", res.P)
		}
	})
	t.Run("ErrOneArm", func(t *testing.T) {
		_, err := Build(docs[:8], names, Options{})
		if err == nil || !strings.Contains(err.Error(), "at least two arms") {
			t.Fatalf("got %v, want an error asking for two arms", err)
		}
	})
	t.Run("ErrUnknownArm", func(t *testing.T) {
		_, err := Build(append(slices.Clone(docs), Doc{Arm: "ghost", Text: "boo"}), names, Options{})
		if err == nil || !strings.Contains(err.Error(), `arm "ghost"`) {
			t.Fatalf("got %v, want an error naming the arm", err)
		}
	})
}

// synthetic makes n fictional messages from arm-specific vocabularies.
func synthetic(n int, seed uint64) []string {
	rng := rand.New(rand.NewPCG(seed, 1))
	out := make([]string, n)
	for i := range out {
		var b strings.Builder
		arm := i % 6
		for w := range 25 {
			pool := 300
			if w%3 == 0 {
				fmt.Fprintf(&b, "arm%dword%d ", arm, rng.IntN(60))
				continue
			}
			fmt.Fprintf(&b, "common%d ", rng.IntN(pool))
		}
		out[i] = b.String()
	}
	return out
}

// exactTop returns the two leading singular values from the eigenvalues of
// XᵀX (gonum's mat.EigenSym), an independent route to the same numbers.
func exactTop(t *testing.T, m *Matrix) []float64 {
	t.Helper()
	d := m.Dense()
	var g mat.SymDense
	g.SymOuterK(1, d.T())
	var eig mat.EigenSym
	if !eig.Factorize(&g, false) {
		t.Fatal("eigendecomposition failed")
	}
	ev := eig.Values(nil)
	slices.Sort(ev)
	n := len(ev)
	return []float64{math.Sqrt(ev[n-1]), math.Sqrt(ev[n-2])}
}
