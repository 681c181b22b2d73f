// Package textmap is Trialogue's manipulation check on the model's own
// text: do the arms' messages differ in content? It computes TF-IDF vectors
// with scikit-learn's TfidfVectorizer defaults, a two-dimensional map by
// truncated SVD (latent semantic analysis), nearest-centroid classification
// of messages to arms with cross-validation and a permutation p-value, the
// cosine distances between arm centroids, and each arm's most
// characteristic terms.
package textmap

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"slices"
	"sort"
	"strings"
	"sync"
	"unicode"

	"gonum.org/v1/gonum/mat"
)

// Doc is one model message and the arm of its session.
type Doc struct {
	Arm  string
	Text string
}

// Tokens splits text as scikit-learn's default token pattern (?u)\b\w\w+\b
// does after lowercasing: maximal runs of word characters (Unicode letters,
// numbers and the underscore), kept when at least two characters long.
func Tokens(text string) []string {
	text = strings.ToLower(text)
	var out []string
	start, n := -1, 0
	for i, r := range text {
		if unicode.IsLetter(r) || unicode.IsNumber(r) || r == '_' {
			if start < 0 {
				start, n = i, 0
			}
			n++
			continue
		}
		if start >= 0 && n >= 2 {
			out = append(out, text[start:i])
		}
		start = -1
	}
	if start >= 0 && n >= 2 {
		out = append(out, text[start:])
	}
	return out
}

// entry is one non-zero of a sparse row.
type entry struct {
	col int32
	val float64
}

// Matrix is a TF-IDF matrix: one sparse, L2-normalized row per document,
// columns in the vocabulary's (sorted) order.
type Matrix struct {
	Vocabulary []string
	IDF        []float64
	Rows       [][]entry
}

// TFIDF computes the matrix with TfidfVectorizer's defaults: raw term
// counts, idf = ln((1+n)/(1+df)) + 1 (smooth_idf), rows scaled to unit
// Euclidean length (norm="l2"); a document without tokens stays zero.
func TFIDF(texts []string) *Matrix {
	counts := make([]map[string]int, len(texts))
	df := map[string]int{}
	for i, t := range texts {
		c := map[string]int{}
		for _, tok := range Tokens(t) {
			c[tok]++
		}
		for tok := range c {
			df[tok]++
		}
		counts[i] = c
	}
	m := &Matrix{Vocabulary: make([]string, 0, len(df))}
	for tok := range df {
		m.Vocabulary = append(m.Vocabulary, tok)
	}
	sort.Strings(m.Vocabulary)
	col := make(map[string]int32, len(df))
	n := float64(len(texts))
	m.IDF = make([]float64, len(m.Vocabulary))
	for j, tok := range m.Vocabulary {
		col[tok] = int32(j)
		m.IDF[j] = math.Log((1+n)/(1+float64(df[tok]))) + 1
	}
	m.Rows = make([][]entry, len(texts))
	for i, c := range counts {
		row := make([]entry, 0, len(c))
		norm := 0.0
		for tok, k := range c {
			j := col[tok]
			v := float64(k) * m.IDF[j]
			row = append(row, entry{j, v})
			norm += v * v
		}
		slices.SortFunc(row, func(a, b entry) int { return int(a.col - b.col) })
		if norm > 0 {
			norm = math.Sqrt(norm)
			for k := range row {
				row[k].val /= norm
			}
		}
		m.Rows[i] = row
	}
	return m
}

// Dense returns the matrix as a dense gonum matrix (for small corpora and
// tests).
func (m *Matrix) Dense() *mat.Dense {
	d := mat.NewDense(max(len(m.Rows), 1), max(len(m.Vocabulary), 1), nil)
	for i, r := range m.Rows {
		for _, e := range r {
			d.Set(i, int(e.col), e.val)
		}
	}
	return d
}

// mulDense returns X·B for a dense B with as many rows as X has columns.
func (m *Matrix) mulDense(b *mat.Dense) *mat.Dense {
	_, l := b.Dims()
	out := mat.NewDense(len(m.Rows), l, nil)
	for i, r := range m.Rows {
		dst := out.RawRowView(i)
		for _, e := range r {
			src := b.RawRowView(int(e.col))
			for j := range dst {
				dst[j] += e.val * src[j]
			}
		}
	}
	return out
}

// tMulDense returns Xᵀ·A for a dense A with as many rows as X.
func (m *Matrix) tMulDense(a *mat.Dense) *mat.Dense {
	_, l := a.Dims()
	out := mat.NewDense(len(m.Vocabulary), l, nil)
	for i, r := range m.Rows {
		src := a.RawRowView(i)
		for _, e := range r {
			dst := out.RawRowView(int(e.col))
			for j := range dst {
				dst[j] += e.val * src[j]
			}
		}
	}
	return out
}

// DenseLimit is the largest matrix (rows × columns) that TruncatedSVD
// decomposes exactly; larger ones use the randomized method.
const DenseLimit = 4 << 20

// SVD is a truncated singular value decomposition.
type SVD struct {
	Values []float64   // the k largest singular values, descending
	Coords [][]float64 // per document, its k coordinates: U·Σ (scikit-learn's transform)
	_      struct{}    // not comparable
}

// TruncatedSVD returns the k leading singular values and the documents'
// coordinates, signs fixed as scikit-learn's svd_flip does (the largest
// entry of each left singular vector is positive). Small matrices are
// decomposed exactly with gonum's mat.SVD; larger ones with the randomized
// range finder of Halko, Martinsson and Tropp (2011) with oversampling and
// power iterations, whose subspace is then decomposed exactly.
func TruncatedSVD(m *Matrix, k int, seed uint64) (*SVD, error) {
	n, v := len(m.Rows), len(m.Vocabulary)
	if n < 2 || v < 1 {
		return nil, fmt.Errorf("truncated svd: %d documents and %d terms are too few", n, v)
	}
	k = min(k, n, v)
	var u *mat.Dense
	var s []float64
	if n*v <= DenseLimit {
		var svd mat.SVD
		if !svd.Factorize(m.Dense(), mat.SVDThin) {
			return nil, errors.New("truncated svd: the decomposition did not converge")
		}
		s = svd.Values(nil)
		u = &mat.Dense{}
		svd.UTo(u)
	} else {
		l := min(k+10, n, v)
		rng := rand.New(rand.NewPCG(seed, 0x5eed))
		omega := mat.NewDense(v, l, nil)
		for i := range v {
			for j := range l {
				omega.Set(i, j, rng.NormFloat64())
			}
		}
		q := orth(m.mulDense(omega))
		for range 7 {
			q = orth(m.mulDense(orth(m.tMulDense(q))))
		}
		// B = Qᵀ X is l × v; its SVD gives X's: U = Q Ub.
		bt := m.tMulDense(q) // v × l, Bᵀ
		var svd mat.SVD
		if !svd.Factorize(bt.T(), mat.SVDThin) {
			return nil, errors.New("truncated svd: the decomposition did not converge")
		}
		s = svd.Values(nil)
		var ub mat.Dense
		svd.UTo(&ub)
		u = &mat.Dense{}
		u.Mul(q, &ub)
	}
	out := &SVD{Values: s[:k], Coords: make([][]float64, n)}
	for i := range out.Coords {
		out.Coords[i] = make([]float64, k)
	}
	for c := range k {
		best, sign := 0.0, 1.0
		for i := range n {
			if a := math.Abs(u.At(i, c)); a > best {
				best, sign = a, math.Copysign(1, u.At(i, c))
			}
		}
		for i := range n {
			out.Coords[i][c] = sign * u.At(i, c) * s[c]
		}
	}
	return out, nil
}

// orth returns an orthonormal basis of a's columns: the left singular
// vectors of a thin SVD (gonum's mat.SVD), which stay orthonormal when a is
// rank-deficient (a corpus with few distinct messages) and never form a
// rows × rows matrix.
func orth(a *mat.Dense) *mat.Dense {
	var svd mat.SVD
	if !svd.Factorize(a, mat.SVDThin) {
		return a
	}
	var u mat.Dense
	svd.UTo(&u)
	return &u
}

// Folds assigns each of n documents to one of k folds: a seeded shuffle
// cut into k parts whose sizes differ by at most one.
func Folds(n, k int, seed uint64) []int {
	perm := rand.New(rand.NewPCG(seed, 0xf01d)).Perm(n)
	fold := make([]int, n)
	for rank, i := range perm {
		fold[i] = rank * k / n
	}
	return fold
}

// classifier evaluates nearest-centroid cross-validation quickly for many
// labelings of the same documents and folds. It keeps the rows in one
// compressed array, fold after fold (in document order within a fold), so
// that a labeling's passes stream through memory and each fold's
// centroids stay in cache while its documents are classified.
type classifier struct {
	m       *Matrix
	fold    []int
	k       int // folds
	classes int
	order   []int   // documents, fold after fold
	start   []int   // order[p]'s entries are cols and vals[start[p]:start[p+1]]
	cols    []int32 // term of each entry
	vals    []float64
}

// newClassifier prepares the rows of m for folds fold (0 … k-1) and the
// given number of classes.
func newClassifier(m *Matrix, fold []int, k, classes int) *classifier {
	c := &classifier{m: m, fold: fold, k: k, classes: classes}
	for f := range k {
		for i, fi := range fold {
			if fi == f {
				c.order = append(c.order, i)
			}
		}
	}
	c.start = append(c.start, 0)
	for _, i := range c.order {
		for _, e := range m.Rows[i] {
			c.cols = append(c.cols, e.col)
			c.vals = append(c.vals, e.val)
		}
		c.start = append(c.start, len(c.cols))
	}
	return c
}

// cvWork is one worker's scratch space for accuracy, reused across
// labelings. Sums and centroids are laid out term by term with the classes
// side by side, so that a document's terms read each class's value from
// one cache line.
type cvWork struct {
	sums  []float64 // folds × terms × stride: per fold, the sums of each class's rows; then that fold's training centroids
	total []float64 // terms × stride
	cnt   []int     // folds × stride
	inv   []float64 // folds × stride: 1 / training count, or NaN when a class is absent from a training set
	norms []float64 // folds × stride: squared norms of the training centroids
	dots  []float64 // stride
}

func (c *classifier) work() *cvWork {
	v, nc := len(c.m.Vocabulary), c.stride()
	fc := c.k * nc
	return &cvWork{sums: make([]float64, c.k*v*nc), total: make([]float64, v*nc),
		cnt: make([]int, fc), inv: make([]float64, fc), norms: make([]float64, fc), dots: make([]float64, nc)}
}

// stride is the layout's classes per term: the number of classes rounded
// up to 4, 6 or a multiple of 8, the sizes accuracy's loops handle; the
// extra ones are never filled nor candidates.
func (c *classifier) stride() int {
	switch {
	case c.classes <= 4:
		return 4
	case c.classes <= 6:
		return 6
	}
	return (c.classes + 7) &^ 7
}

// accuracy is the share of documents whose nearest training centroid (by
// Euclidean distance, as scikit-learn's NearestCentroid) is their own
// class's, each document classified by centroids of the other folds.
// Classes absent from a training set are not candidates. Ties go to the
// lower class index. It also returns the predictions when pred is not nil.
// w is scratch space from c.work.
func (c *classifier) accuracy(label []int, pred []int, w *cvWork) float64 {
	v, nc := len(c.m.Vocabulary), c.stride()
	clear(w.sums)
	clear(w.cnt)
	// Sums per fold and class, then class totals.
	for p, i := range c.order {
		f := c.fold[i]
		w.cnt[f*nc+label[i]]++
		s := w.sums[f*v*nc+label[i]:]
		vals := c.vals[c.start[p]:c.start[p+1]]
		for q, col := range c.cols[c.start[p]:c.start[p+1]] {
			s[int(col)*nc] += vals[q]
		}
	}
	clear(w.total)
	for f := range c.k {
		for j, x := range w.sums[f*v*nc : (f+1)*v*nc] {
			w.total[j] += x
		}
	}
	// Centroids of the training set of each fold, reusing the sums.
	for f := range c.k {
		for cl := range nc {
			idx := f*nc + cl
			nTrain := 0
			for g := range c.k {
				nTrain += w.cnt[g*nc+cl]
			}
			nTrain -= w.cnt[idx]
			w.inv[idx] = math.NaN()
			if nTrain > 0 {
				w.inv[idx] = 1 / float64(nTrain)
			}
		}
		inv := w.inv[f*nc : (f+1)*nc]
		norms := w.norms[f*nc : (f+1)*nc]
		clear(norms)
		s := w.sums[f*v*nc : (f+1)*v*nc]
		for j := 0; j < len(s); j += nc {
			sj, tj := s[j:j+nc], w.total[j:j+nc]
			for cl, x := range inv {
				if math.IsNaN(x) {
					continue
				}
				sj[cl] = (tj[cl] - sj[cl]) * x
				norms[cl] += sj[cl] * sj[cl]
			}
		}
	}
	correct := 0
	dots := w.dots
	for p, i := range c.order {
		f := c.fold[i]
		cent := w.sums[f*v*nc : (f+1)*v*nc]
		vals := c.vals[c.start[p]:c.start[p+1]]
		cols := c.cols[c.start[p]:c.start[p+1]]
		// The classes' sums in local variables, eight (or fewer) at a time:
		// a sum kept in memory would make every term wait for the previous
		// term's store.
		switch nc {
		case 4:
			var d0, d1, d2, d3 float64
			for q, col := range cols {
				x, cs := vals[q], cent[int(col)*4:][:4]
				d0 += x * cs[0]
				d1 += x * cs[1]
				d2 += x * cs[2]
				d3 += x * cs[3]
			}
			dots[0], dots[1], dots[2], dots[3] = d0, d1, d2, d3
		case 6:
			var d0, d1, d2, d3, d4, d5 float64
			for q, col := range cols {
				x, cs := vals[q], cent[int(col)*6:][:6]
				d0 += x * cs[0]
				d1 += x * cs[1]
				d2 += x * cs[2]
				d3 += x * cs[3]
				d4 += x * cs[4]
				d5 += x * cs[5]
			}
			dots[0], dots[1], dots[2], dots[3], dots[4], dots[5] = d0, d1, d2, d3, d4, d5
		default:
			for c0 := 0; c0 < nc; c0 += 8 {
				var d0, d1, d2, d3, d4, d5, d6, d7 float64
				for q, col := range cols {
					x, cs := vals[q], cent[int(col)*nc+c0:][:8]
					d0 += x * cs[0]
					d1 += x * cs[1]
					d2 += x * cs[2]
					d3 += x * cs[3]
					d4 += x * cs[4]
					d5 += x * cs[5]
					d6 += x * cs[6]
					d7 += x * cs[7]
				}
				copy(dots[c0:c0+8], []float64{d0, d1, d2, d3, d4, d5, d6, d7})
			}
		}
		best, bestCl := math.Inf(1), -1
		for cl, dot := range dots[:c.classes] {
			idx := f*nc + cl
			if math.IsNaN(w.inv[idx]) {
				continue
			}
			if d := w.norms[idx] - 2*dot; d < best {
				best, bestCl = d, cl
			}
		}
		if pred != nil {
			pred[i] = bestCl
		}
		if bestCl == label[i] {
			correct++
		}
	}
	return float64(correct) / float64(len(c.m.Rows))
}

// Term is a term and its score.
type Term struct {
	Term  string  `json:"term"`
	Score float64 `json:"score"` // mean TF-IDF in the arm minus mean TF-IDF in the other arms
}

// Options tune the map.
type Options struct {
	Folds        int    // cross-validation folds; default 5
	Permutations int    // label permutations for the p-value; default 1000, 0 skips
	Seed         uint64 // seeds folds, permutations and the randomized SVD
	TopTerms     int    // terms per arm; default 10
}

// Result is the arms map.
type Result struct {
	Arms      []string    `json:"arms"`
	Docs      int         `json:"messages"`
	Terms     int         `json:"terms"`
	Singular  []float64   `json:"singular_values"`
	Coords    [][]float64 `json:"-"`
	DocArm    []int       `json:"-"`
	Accuracy  float64     `json:"cv_accuracy"`
	Chance    float64     `json:"chance"` // share of the most frequent arm: what always guessing it scores
	P         float64     `json:"permutation_p"`
	Perms     int         `json:"permutations"`
	Folds     int         `json:"folds"`
	Distances [][]float64 `json:"centroid_cosine_distances"`
	Top       [][]Term    `json:"top_terms"`
	Pred      []int       `json:"-"` // cross-validated prediction per document (arm index)
}

// Build computes the arms map of the documents; arms lists the arms in
// the order to report them (arms without messages are left out).
func Build(docs []Doc, arms []string, opt Options) (*Result, error) {
	if opt.Folds == 0 {
		opt.Folds = 5
	}
	if opt.TopTerms == 0 {
		opt.TopTerms = 10
	}
	if opt.Permutations < 0 || opt.Folds < 2 {
		return nil, fmt.Errorf("arms map: need at least 2 folds and 0 or more permutations")
	}
	present := map[string]int{}
	for _, d := range docs {
		present[d.Arm]++
	}
	res := &Result{Docs: len(docs), Perms: opt.Permutations, Folds: opt.Folds}
	idx := map[string]int{}
	for _, a := range arms {
		if present[a] > 0 {
			idx[a] = len(res.Arms)
			res.Arms = append(res.Arms, a)
		}
	}
	if len(res.Arms) < 2 {
		return nil, fmt.Errorf("arms map: messages from at least two arms are needed; found %d arm(s) with model messages", len(res.Arms))
	}
	if len(docs) < 2*opt.Folds {
		return nil, fmt.Errorf("arms map: %d messages are too few for %d-fold cross-validation", len(docs), opt.Folds)
	}
	texts := make([]string, len(docs))
	res.DocArm = make([]int, len(docs))
	for i, d := range docs {
		a, ok := idx[d.Arm]
		if !ok {
			return nil, fmt.Errorf("arms map: message %d is from arm %q, which is not in the study", i+1, d.Arm)
		}
		texts[i], res.DocArm[i] = d.Text, a
	}
	m := TFIDF(texts)
	res.Terms = len(m.Vocabulary)
	if res.Terms == 0 {
		return nil, errors.New("arms map: the messages have no words")
	}
	svd, err := TruncatedSVD(m, 2, opt.Seed)
	if err != nil {
		return nil, err
	}
	res.Singular, res.Coords = svd.Values, svd.Coords
	for len(res.Singular) < 2 {
		res.Singular = append(res.Singular, 0)
	}
	for i := range res.Coords {
		for len(res.Coords[i]) < 2 {
			res.Coords[i] = append(res.Coords[i], 0)
		}
	}
	k := len(res.Arms)
	most := 0
	for _, a := range res.Arms {
		most = max(most, present[a])
	}
	res.Chance = float64(most) / float64(len(docs))
	cl := newClassifier(m, Folds(len(docs), opt.Folds, opt.Seed), opt.Folds, k)
	res.Pred = make([]int, len(docs))
	res.Accuracy = cl.accuracy(res.DocArm, res.Pred, cl.work())
	res.P = math.NaN()
	if opt.Permutations > 0 {
		workers := min(runtime.GOMAXPROCS(0), opt.Permutations)
		hits := make([]int, workers)
		var wg sync.WaitGroup
		for w := range workers {
			wg.Add(1)
			go func() {
				defer wg.Done()
				label := make([]int, len(docs))
				work := cl.work()
				for p := w; p < opt.Permutations; p += workers {
					copy(label, res.DocArm)
					rng := rand.New(rand.NewPCG(opt.Seed, uint64(p)+1))
					rng.Shuffle(len(label), func(i, j int) { label[i], label[j] = label[j], label[i] })
					if cl.accuracy(label, nil, work) >= res.Accuracy-1e-12 {
						hits[w]++
					}
				}
			}()
		}
		wg.Wait()
		h := 0
		for _, x := range hits {
			h += x
		}
		res.P = float64(1+h) / float64(1+opt.Permutations)
	}
	// Full-data centroids: distances and characteristic terms.
	v := len(m.Vocabulary)
	cent := make([][]float64, k)
	cnt := make([]float64, k)
	sumAll := make([]float64, v)
	for c := range cent {
		cent[c] = make([]float64, v)
	}
	for i, r := range m.Rows {
		a := res.DocArm[i]
		cnt[a]++
		for _, e := range r {
			cent[a][e.col] += e.val
			sumAll[e.col] += e.val
		}
	}
	for c := range cent {
		for j := range cent[c] {
			cent[c][j] /= cnt[c]
		}
	}
	res.Distances = make([][]float64, k)
	for a := range k {
		res.Distances[a] = make([]float64, k)
		for b := range k {
			res.Distances[a][b] = 1 - cosine(cent[a], cent[b])
		}
	}
	nAll := float64(len(docs))
	for a := range k {
		terms := make([]Term, v)
		for j := range v {
			other := (sumAll[j] - cent[a][j]*cnt[a]) / (nAll - cnt[a])
			terms[j] = Term{m.Vocabulary[j], cent[a][j] - other}
		}
		slices.SortStableFunc(terms, func(x, y Term) int {
			switch {
			case x.Score > y.Score:
				return -1
			case x.Score < y.Score:
				return 1
			}
			return strings.Compare(x.Term, y.Term)
		})
		res.Top = append(res.Top, terms[:min(opt.TopTerms, v)])
	}
	return res, nil
}

func cosine(a, b []float64) float64 {
	var ab, aa, bb float64
	for i := range a {
		ab += a[i] * b[i]
		aa += a[i] * a[i]
		bb += b[i] * b[i]
	}
	if aa == 0 || bb == 0 {
		return 0
	}
	return ab / math.Sqrt(aa*bb)
}
