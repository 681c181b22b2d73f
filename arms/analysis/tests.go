package analysis

import (
	"fmt"
	"math"
	"slices"

	"gonum.org/v1/gonum/stat/distuv"
)

// Anova is a one-way analysis of variance.
type Anova struct {
	DFBetween, DFWithin int
	SSBetween, SSWithin float64
	MSBetween, MSWithin float64
	F, P                float64
	R2                  float64
	ResidualSD          float64
}

// accurateMean is the mean with one correction step, which recovers the
// digits a plain sum loses when values share many leading digits (NIST's
// AtmWtAg).
func accurateMean(v []float64) float64 {
	m := 0.0
	for _, x := range v {
		m += x
	}
	m /= float64(len(v))
	c := 0.0
	for _, x := range v {
		c += x - m
	}
	return m + c/float64(len(v))
}

// OneWay is the one-way ANOVA F test of equal means across groups, with the
// p-value from the F distribution (gonum's distuv.F). Groups need at least
// one value each, and two groups are needed.
func OneWay(groups [][]float64) (Anova, error) {
	var all []float64
	for _, g := range groups {
		if len(g) == 0 {
			return Anova{}, fmt.Errorf("one-way anova: an empty group")
		}
		all = append(all, g...)
	}
	k, n := len(groups), len(all)
	if k < 2 || n <= k {
		return Anova{}, fmt.Errorf("one-way anova: %d groups and %d values are too few", k, n)
	}
	grand := accurateMean(all)
	var a Anova
	for _, g := range groups {
		m := accurateMean(g)
		a.SSBetween += float64(len(g)) * (m - grand) * (m - grand)
		for _, x := range g {
			a.SSWithin += (x - m) * (x - m)
		}
	}
	a.DFBetween, a.DFWithin = k-1, n-k
	a.MSBetween = a.SSBetween / float64(a.DFBetween)
	a.MSWithin = a.SSWithin / float64(a.DFWithin)
	a.F = a.MSBetween / a.MSWithin
	a.P = distuv.F{D1: float64(a.DFBetween), D2: float64(a.DFWithin)}.Survival(a.F)
	a.R2 = a.SSBetween / (a.SSBetween + a.SSWithin)
	a.ResidualSD = math.Sqrt(a.MSWithin)
	return a, nil
}

// ChiSquare is Pearson's chi-square test of independence on a contingency
// table, without a continuity correction.
type ChiSquare struct {
	Stat, P float64
	DF      int
	// Dropped counts rows and columns left out because their total is zero.
	Dropped int
}

// Independence tests a rows × columns table of counts. Rows or columns with a
// zero total carry no information and are left out (and counted); fewer than
// two of either left is an error. The p-value is from gonum's
// distuv.ChiSquared.
func Independence(table [][]float64) (ChiSquare, error) {
	var out ChiSquare
	if len(table) == 0 {
		return out, fmt.Errorf("chi-square: empty table")
	}
	cols := len(table[0])
	rowSum := make([]float64, len(table))
	colSum := make([]float64, cols)
	total := 0.0
	for i, r := range table {
		if len(r) != cols {
			return out, fmt.Errorf("chi-square: row %d has %d cells, want %d", i+1, len(r), cols)
		}
		for j, v := range r {
			if v < 0 || math.IsNaN(v) {
				return out, fmt.Errorf("chi-square: cell (%d, %d) is %v, not a count", i+1, j+1, v)
			}
			rowSum[i] += v
			colSum[j] += v
			total += v
		}
	}
	keepR := slices.DeleteFunc(seq(len(table)), func(i int) bool { return rowSum[i] == 0 })
	keepC := slices.DeleteFunc(seq(cols), func(j int) bool { return colSum[j] == 0 })
	out.Dropped = len(table) - len(keepR) + cols - len(keepC)
	if len(keepR) < 2 || len(keepC) < 2 {
		return out, fmt.Errorf("chi-square: fewer than two non-empty rows or columns")
	}
	for _, i := range keepR {
		for _, j := range keepC {
			e := rowSum[i] * colSum[j] / total
			d := table[i][j] - e
			out.Stat += d * d / e
		}
	}
	out.DF = (len(keepR) - 1) * (len(keepC) - 1)
	out.P = distuv.ChiSquared{K: float64(out.DF)}.Survival(out.Stat)
	return out, nil
}

func seq(n int) []int {
	s := make([]int, n)
	for i := range s {
		s[i] = i
	}
	return s
}

// Holm adjusts p-values for testing several hypotheses (Holm 1979): sorted
// ascending, the i-th smallest (from 0) is multiplied by m-i, running maxima
// keep the order, and values are capped at 1. NaN p-values stay NaN and do
// not count.
func Holm(p []float64) []float64 {
	idx := make([]int, 0, len(p))
	for i, v := range p {
		if !math.IsNaN(v) {
			idx = append(idx, i)
		}
	}
	slices.SortStableFunc(idx, func(a, b int) int {
		switch {
		case p[a] < p[b]:
			return -1
		case p[a] > p[b]:
			return 1
		}
		return 0
	})
	out := make([]float64, len(p))
	for i := range out {
		out[i] = math.NaN()
	}
	m := len(idx)
	run := 0.0
	for rank, i := range idx {
		v := math.Min(1, float64(m-rank)*p[i])
		run = math.Max(run, v)
		out[i] = run
	}
	return out
}
