package drift

import (
	"math"
	"sort"
)

// KS2 is the two-sample Kolmogorov–Smirnov test: the largest distance D
// between the empirical distribution functions of x and y, and the
// two-sided p-value P(D' >= D) under the null hypothesis that both samples
// come from one continuous distribution. The p-value is exact: it counts,
// among all C(m+n, m) equally likely orderings of the pooled sample, those
// whose distance stays below D (the lattice-path method of Hodges, 1958).
// Ties between the samples make it conservative, as for any exact KS test.
func KS2(x, y []float64) (d, p float64) {
	m, n := len(x), len(y)
	if m == 0 || n == 0 {
		return 0, 1
	}
	xs := append([]float64(nil), x...)
	ys := append([]float64(nil), y...)
	sort.Float64s(xs)
	sort.Float64s(ys)
	// D as an integer on the lattice: max |i*n - j*m| over the pooled order.
	var i, j, h int
	for i < m || j < n {
		var v float64
		switch {
		case j >= n || (i < m && xs[i] <= ys[j]):
			v = xs[i]
		default:
			v = ys[j]
		}
		for i < m && xs[i] == v {
			i++
		}
		for j < n && ys[j] == v {
			j++
		}
		if a := abs(i*n - j*m); a > h {
			h = a
		}
	}
	d = float64(h) / float64(m*n)
	if h == 0 {
		return 0, 1
	}
	return d, pathsOutside(m, n, h)
}

// pathsOutside is the share of monotone lattice paths from (0,0) to (m,n)
// that reach a point with |i*n - j*m| >= h: the probability of a distance
// of at least h/(m*n). Counts are kept as fractions of all paths so far,
// which cannot overflow.
func pathsOutside(m, n, h int) float64 {
	// inside[j] holds, for the current row i, the probability that a random
	// path passes through (i, j) having stayed inside the band.
	inside := make([]float64, n+1)
	for i := 0; i <= m; i++ {
		for j := 0; j <= n; j++ {
			if abs(i*n-j*m) >= h {
				inside[j] = 0
				continue
			}
			if i == 0 && j == 0 {
				inside[j] = 1
				continue
			}
			// a path at (i, j) came from (i-1, j) or (i, j-1); with k = i+j steps
			// taken, the step before was along i with probability i/k
			var v float64
			k := float64(i + j)
			if i > 0 {
				v += inside[j] * float64(i) / k // inside[j] still holds row i-1
			}
			if j > 0 {
				v += inside[j-1] * float64(j) / k
			}
			inside[j] = v
		}
	}
	p := 1 - inside[n]
	return math.Min(1, math.Max(0, p))
}

func abs(v int) int {
	if v < 0 {
		return -v
	}
	return v
}
