package analysis

import (
	"crypto/sha256"
	"encoding/binary"
	"fmt"
	"math"
	"math/rand/v2"
	"runtime"
	"sync"

	"gonum.org/v1/gonum/mat"

	"trialogue/arms/assign"
)

// Redraw fills dst with the arm indexes (into the scheme's arms, in
// declared order) of the first len(dst) slots of a stratum's allocation
// sequence under seed: the sequence assign.Plan gives, computed without its
// cache so that thousands of re-draws cost no allocation. It follows steps 1
// to 5 of the assign package documentation with assign's own StratumKey and
// Draw; TestRedrawMatchesPlan holds it to assign.Plan. list is scratch
// space for one block; Redraw returns it, grown, for the next call.
func Redraw(seed []byte, sc assign.Scheme, stratum string, dst []int32, list []int32) []int32 {
	src := rand.NewChaCha8(assign.StratumKey(seed, stratum))
	sum := 0
	for _, r := range sc.Arms {
		sum += r.Weight
	}
	for filled := 0; filled < len(dst); {
		size := sc.Blocks[drawSlot(src, len(sc.Blocks))]
		list = list[:0]
		for a, r := range sc.Arms {
			for range r.Weight * size / sum {
				list = append(list, int32(a))
			}
		}
		for i := size - 1; i >= 1; i-- {
			j := drawSlot(src, i+1)
			list[i], list[j] = list[j], list[i]
		}
		filled += copy(dst[filled:], list)
	}
	return list
}

// drawSlot is assign.Draw (step 3: rejection sampling, then x mod n) with the
// divisions by the small sizes that blocks use written as constants, which
// the compiler turns into multiplications: a re-draw of 100,000 slots is
// otherwise dominated by 64-bit divisions. Larger n goes to assign.Draw.
func drawSlot(src *rand.ChaCha8, n int) int {
	switch n {
	case 1:
		src.Uint64()
		return 0
	case 2:
		return int(src.Uint64() % 2) // 2^64 mod 2 = 0: no rejection
	case 3:
		return int(modConst3(src))
	case 4:
		return int(src.Uint64() % 4)
	case 5:
		return int(modConst5(src))
	case 6:
		return int(modConst6(src))
	case 8:
		return int(src.Uint64() % 8)
	case 10:
		return int(modConst10(src))
	case 12:
		return int(modConst12(src))
	}
	return assign.Draw(src, n)
}

// The limits are 2^64 - 1 - (2^64 mod n): values above them are rejected.
func modConst3(src *rand.ChaCha8) uint64 {
	const limit = ^uint64(0) - (^uint64(0)%3+1)%3
	for {
		if x := src.Uint64(); x <= limit {
			return x % 3
		}
	}
}

func modConst5(src *rand.ChaCha8) uint64 {
	const limit = ^uint64(0) - (^uint64(0)%5+1)%5
	for {
		if x := src.Uint64(); x <= limit {
			return x % 5
		}
	}
}

func modConst6(src *rand.ChaCha8) uint64 {
	const limit = ^uint64(0) - (^uint64(0)%6+1)%6
	for {
		if x := src.Uint64(); x <= limit {
			return x % 6
		}
	}
}

func modConst10(src *rand.ChaCha8) uint64 {
	const limit = ^uint64(0) - (^uint64(0)%10+1)%10
	for {
		if x := src.Uint64(); x <= limit {
			return x % 10
		}
	}
}

func modConst12(src *rand.ChaCha8) uint64 {
	const limit = ^uint64(0) - (^uint64(0)%12+1)%12
	for {
		if x := src.Uint64(); x <= limit {
			return x % 12
		}
	}
}

// drawSeed derives the seed of re-draw d from the master seed: fresh seeds,
// unrelated to the study's own, and reproducible from the master seed.
func drawSeed(master uint64, d int) []byte {
	var b [len("trialogue/ri/v1") + 16]byte
	n := copy(b[:], "trialogue/ri/v1")
	binary.BigEndian.PutUint64(b[n:], master)
	binary.BigEndian.PutUint64(b[n+8:], uint64(d))
	h := sha256.Sum256(b[:])
	return h[:]
}

// suffStats turns a unit's data into the vector whose sums per group
// determine the estimate, and the estimate from those sums.
type suffStats struct {
	dim  int
	z    []float64 // units × dim
	tot  []float64 // sums over every unit
	k    int       // treatment arms
	est  func(sums [][]float64) ([]float64, error)
	work []float64
}

// newSuffStats prepares the per-unit vectors. For none and pre, the
// estimate comes from a partitioned regression: with W the intercept and
// additive columns (fixed under re-draws) and D the arm indicators,
// τ = (D'D − D'W (W'W)⁻¹ W'D)⁻¹ (D'y − D'W (W'W)⁻¹ W'y), which needs only
// the per-arm sums of W's rows and of y. For Lin, each group's own
// regression on the covariates centered at the sample mean gives its
// adjusted mean; τ_k is arm k's minus the control's, which needs per-group
// sums of x, y, xx' and xy.
func (s *sample) newSuffStats() (*suffStats, error) {
	adj, _ := s.adjusters()
	n := len(s.y)
	k := s.groups - 1
	ss := &suffStats{k: k}
	if s.spec.Adjust != AdjustLin {
		q := 1 + len(adj)
		ss.dim = q + 1
		ss.z = make([]float64, n*ss.dim)
		wtw := mat.NewSymDense(q, nil)
		wty := make([]float64, q)
		w := make([]float64, q)
		for i := range n {
			w[0] = 1
			for j, c := range adj {
				w[1+j] = c[i]
			}
			z := ss.z[i*ss.dim : (i+1)*ss.dim]
			copy(z, w)
			z[q] = s.y[i]
			for a := range q {
				wty[a] += w[a] * s.y[i]
				for b := a; b < q; b++ {
					wtw.SetSym(a, b, wtw.At(a, b)+w[a]*w[b])
				}
			}
		}
		var ch mat.Cholesky
		if !ch.Factorize(wtw) {
			return nil, fmt.Errorf("randomization inference: the adjustment columns are collinear")
		}
		// A = (W'W)⁻¹ W'y, reused by every draw.
		var wa mat.VecDense
		if err := ch.SolveVecTo(&wa, mat.NewVecDense(q, wty)); err != nil {
			return nil, fmt.Errorf("randomization inference: %w", err)
		}
		ss.est = func(sums [][]float64) ([]float64, error) {
			// sums[g] for treatment groups g = 1..k, each (w sums, y sum).
			dw := mat.NewDense(k, q, nil)
			lhs := mat.NewDense(k, k, nil)
			rhs := mat.NewVecDense(k, nil)
			for g := 1; g <= k; g++ {
				dw.SetRow(g-1, sums[g][:q])
				lhs.Set(g-1, g-1, sums[g][0]) // the count, from the intercept column
				rhs.SetVec(g-1, sums[g][q]-mat.Dot(dw.RowView(g-1), &wa))
			}
			var sol, prod mat.Dense
			if err := ch.SolveTo(&sol, dw.T()); err != nil {
				return nil, err
			}
			prod.Mul(dw, &sol)
			lhs.Sub(lhs, &prod)
			var tau mat.VecDense
			if err := tau.SolveVec(lhs, rhs); err != nil {
				return nil, err
			}
			return tau.RawVector().Data, nil
		}
		return ss, ss.total()
	}
	p := len(adj)
	cent := make([][]float64, p)
	for j, c := range adj {
		m := accurateMean(c)
		cent[j] = make([]float64, n)
		for i, v := range c {
			cent[j][i] = v - m
		}
	}
	// Layout: count, x (p), y, xx' upper triangle (p(p+1)/2), xy (p).
	tri := p * (p + 1) / 2
	ss.dim = 1 + p + 1 + tri + p
	ss.z = make([]float64, n*ss.dim)
	for i := range n {
		z := ss.z[i*ss.dim : (i+1)*ss.dim]
		z[0] = 1
		y := s.y[i]
		z[1+p] = y
		t := 2 + p
		for a := range p {
			xa := cent[a][i]
			z[1+a] = xa
			for b := a; b < p; b++ {
				z[t] = xa * cent[b][i]
				t++
			}
			z[2+p+tri+a] = xa * y
		}
	}
	adjMean := func(sum []float64) (float64, error) {
		cnt := sum[0]
		xbar := make([]float64, p)
		for a := range p {
			xbar[a] = sum[1+a] / cnt
		}
		ybar := sum[1+p] / cnt
		cxx := mat.NewSymDense(p, nil)
		cxy := mat.NewVecDense(p, nil)
		t := 2 + p
		for a := range p {
			for b := a; b < p; b++ {
				cxx.SetSym(a, b, sum[t]-cnt*xbar[a]*xbar[b])
				t++
			}
			cxy.SetVec(a, sum[2+p+tri+a]-cnt*xbar[a]*ybar)
		}
		var bvec mat.VecDense
		var ch mat.Cholesky
		if !ch.Factorize(cxx) {
			return 0, fmt.Errorf("covariates are collinear within a group")
		}
		if err := ch.SolveVecTo(&bvec, cxy); err != nil {
			return 0, err
		}
		return ybar - mat.Dot(mat.NewVecDense(p, xbar), &bvec), nil
	}
	ss.est = func(sums [][]float64) ([]float64, error) {
		mu0, err := adjMean(sums[0])
		if err != nil {
			return nil, err
		}
		tau := make([]float64, k)
		for g := 1; g <= k; g++ {
			mu, err := adjMean(sums[g])
			if err != nil {
				return nil, err
			}
			tau[g-1] = mu - mu0
		}
		return tau, nil
	}
	return ss, ss.total()
}

func (ss *suffStats) total() error {
	ss.tot = make([]float64, ss.dim)
	for i := 0; i < len(ss.z); i += ss.dim {
		for j, v := range ss.z[i : i+ss.dim] {
			ss.tot[j] += v
		}
	}
	return nil
}

// estimate computes τ for a grouping of the units (0 control, 1..k arms).
// acc is scratch space of (k+1) × dim.
func (ss *suffStats) estimate(group []int32, acc [][]float64) ([]float64, error) {
	for g := 1; g <= ss.k; g++ {
		clear(acc[g])
	}
	dim := ss.dim
	for i, g := range group {
		if g == 0 {
			continue
		}
		a := acc[g][:dim]
		z := ss.z[i*dim : i*dim+dim]
		for j := range a {
			a[j] += z[j]
		}
	}
	copy(acc[0], ss.tot)
	for g := 1; g <= ss.k; g++ {
		for j := range acc[0] {
			acc[0][j] -= acc[g][j]
		}
	}
	return ss.est(acc)
}

// randomization returns, for each treatment arm, the randomization-
// inference p-value of the sharp null of no effect for anyone: the share of
// re-draws of the study's scheme (same strata, same block sizes, fresh
// seeds; each respondent keeps their stratum and slot) whose estimate is at
// least as far from zero as the observed one, counting the observed
// assignment as one draw: (1 + #{|τ*| ≥ |τ|}) / (1 + N).
func (s *sample) randomization(d *design, observed []float64) ([]float64, error) {
	ss, err := s.newSuffStats()
	if err != nil {
		return nil, err
	}
	sc := d.study.Scheme()
	armGroup := make([]int32, len(sc.Arms))
	for a, r := range sc.Arms {
		armGroup[a] = int32(d.armGroup[r.Arm])
	}
	// Units by stratum, with the length of sequence each stratum needs.
	type stratumUnits struct {
		key   string
		idx   []int // sample index
		slots []int
		need  int
	}
	var strata []*stratumUnits
	byKey := map[string]*stratumUnits{}
	for i, ui := range s.units {
		u := d.units[ui]
		st := byKey[u.Stratum]
		if st == nil {
			st = &stratumUnits{key: u.Stratum}
			byKey[u.Stratum] = st
			strata = append(strata, st)
		}
		st.idx = append(st.idx, i)
		st.slots = append(st.slots, u.Slot)
		st.need = max(st.need, u.Slot+1)
	}
	k := ss.k
	newAcc := func() [][]float64 {
		acc := make([][]float64, k+1)
		for g := range acc {
			acc[g] = make([]float64, ss.dim)
		}
		return acc
	}
	// The observed statistic, through the same code path as the re-draws.
	obsGroup := make([]int32, len(s.group))
	for i, g := range s.group {
		obsGroup[i] = int32(g)
	}
	obs, err := ss.estimate(obsGroup, newAcc())
	if err != nil {
		return nil, fmt.Errorf("randomization inference: %w", err)
	}
	for j := range obs {
		if math.Abs(obs[j]-observed[j]) > 1e-8*math.Max(1, math.Abs(observed[j])) {
			return nil, fmt.Errorf("randomization inference: the statistic %g disagrees with the regression's estimate %g", obs[j], observed[j])
		}
	}
	n := s.spec.Permutations
	workers := min(runtime.GOMAXPROCS(0), n)
	counts := make([][]int, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			cnt := make([]int, k)
			acc := newAcc()
			group := make([]int32, len(s.y))
			maxNeed := 0
			for _, st := range strata {
				maxNeed = max(maxNeed, st.need)
			}
			seq := make([]int32, maxNeed)
			var list []int32
			for draw := w; draw < n; draw += workers {
				seed := drawSeed(s.spec.Seed, draw)
				for _, st := range strata {
					list = Redraw(seed, sc, st.key, seq[:st.need], list)
					for j, i := range st.idx {
						group[i] = armGroup[seq[st.slots[j]]]
					}
				}
				tau, err := ss.estimate(group, acc)
				if err != nil {
					// A re-draw can leave a group without the spread Lin needs;
					// it then counts as at least as extreme, which is conservative.
					for j := range cnt {
						cnt[j]++
					}
					continue
				}
				for j, v := range tau {
					if math.Abs(v) >= math.Abs(obs[j])*(1-1e-12) {
						cnt[j]++
					}
				}
			}
			counts[w] = cnt
		}()
	}
	wg.Wait()
	out := make([]float64, k)
	for j := range out {
		c := 0
		for w := range workers {
			c += counts[w][j]
		}
		out[j] = float64(1+c) / float64(1+n)
	}
	return out, nil
}
