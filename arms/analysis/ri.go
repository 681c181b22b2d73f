package analysis

import (
	"crypto/sha256"
	"encoding/binary"
	"errors"
	"fmt"
	"math"
	"math/bits"
	"math/rand/v2"
	"runtime"
	"slices"
	"strings"
	"sync"
	"sync/atomic"

	"gonum.org/v1/gonum/mat"

	"trialogue/arms/assign"
)

// dealer deals the permuted blocks of a study's allocation scheme from a
// fast seeded generator (math/rand/v2's PCG). Randomization inference needs
// re-draws of the study's scheme (its strata, its block sizes, each block
// an exact permutation of the ratio, with fresh seeds) but not the audited
// ChaCha8 stream of package assign that fixes the study's own sequence:
// any uniform draws give re-draws from the same distribution. A dealer
// allocates nothing per block and spends little randomness: one 32-bit
// word orders a whole block of up to 12 slots, or serves four draws of a
// larger block's shuffle.
type dealer struct {
	src    rand.PCG
	spare  uint32 // the high half of the last 64-bit output, when has
	has    bool
	blocks []dealBlock
	perms  [7][]uint8 // perms[k]: every order of 0 … k-1, k bytes each
	starts [][]int32  // deal's scratch: per block size, where its blocks start
}

// dealBlock is one block size: the ratio list (each arm, in declared
// order, repeated its share of the block), where each arm's run of the
// list ends, and the steps of its shuffle.
type dealBlock struct {
	ratio []int32
	ends  []int  // ends[a]: one past arm a's last entry in ratio
	steps []step // steps[k] draws the swap partner of entry k+1
	// Blocks of at most tableMax slots are dealt from tables instead (tab
	// set): the block's first h entries go to a subset of h slots, in
	// some order, and the others to the remaining slots, in some order;
	// subsets lists every subset's slots then the rest's, n bytes each.
	// One uniform draw from [0, n!) picks subset and orders (nsub · h! ·
	// (n-h)! = n!), each permutation of the slots once.
	tab     bool
	h       int
	nsub    uint32
	f1, f2  uint32 // h! and (n-h)!
	fact    uint32 // n!
	reject  uint32 // 2^32 mod n!
	subsets []uint8
}

// tableMax is the largest block dealt from tables: 12! < 2^32, so one
// 32-bit word picks the block's order.
const tableMax = 12

// step is one draw of the shuffle: j uniform in [0, i] for entry i. Draws
// are grouped into batches that one 32-bit word serves: a batch's first
// step takes a fresh word, and carries the product of the batch's ranges
// (below 2^32) and its rejection threshold 2^32 mod prod.
type step struct {
	rng    uint32 // i + 1
	fresh  bool
	prod   uint32
	reject uint32
}

// batchSteps bounds the steps of a batch: a batch's draws are a chain of
// dependent multiplications, and short chains let the processor overlap
// them.
const batchSteps = 4

// newDealer prepares a dealer for the scheme, which must be valid.
func newDealer(sc assign.Scheme) *dealer {
	sum := 0
	for _, r := range sc.Arms {
		sum += r.Weight
	}
	d := &dealer{}
	for _, size := range sc.Blocks {
		var b dealBlock
		for a, r := range sc.Arms {
			for range r.Weight * size / sum {
				b.ratio = append(b.ratio, int32(a))
			}
			b.ends = append(b.ends, len(b.ratio))
		}
		for i := 1; i < size; {
			first := len(b.steps)
			prod := uint64(1)
			for ; i < size && len(b.steps)-first < batchSteps; i++ {
				if prod*uint64(i+1) > math.MaxUint32 {
					break
				}
				prod *= uint64(i + 1)
				b.steps = append(b.steps, step{rng: uint32(i + 1)})
			}
			p := uint32(prod)
			b.steps[first].fresh, b.steps[first].prod, b.steps[first].reject = true, p, -p%p
		}
		if size <= tableMax {
			b.tab, b.h = true, size
			if size > 6 {
				b.h = size / 2
			}
			fact := uint32(1)
			b.f1, b.f2 = 1, 1
			for i := 2; i <= size; i++ {
				fact *= uint32(i)
				if i <= b.h {
					b.f1 *= uint32(i)
				}
				if i <= size-b.h {
					b.f2 *= uint32(i)
				}
			}
			b.fact, b.reject = fact, -fact%fact
			for mask := range 1 << size {
				if bits.OnesCount(uint(mask)) != b.h {
					continue
				}
				b.nsub++
				for in := 1; in >= 0; in-- {
					for p := range size {
						if (mask>>p)&1 == in {
							b.subsets = append(b.subsets, uint8(p))
						}
					}
				}
			}
		}
		d.blocks = append(d.blocks, b)
	}
	for k := range d.perms {
		d.perms[k] = orders(k)
	}
	d.starts = make([][]int32, len(d.blocks))
	return d
}

// orders lists every order of 0 … k-1, k bytes each.
func orders(k int) []uint8 {
	if k == 0 {
		return nil
	}
	var out []uint8
	var walk func(cur []uint8, used int)
	walk = func(cur []uint8, used int) {
		if len(cur) == k {
			out = append(out, cur...)
			return
		}
		for v := range k {
			if used&(1<<v) == 0 {
				walk(append(cur, uint8(v)), used|1<<v)
			}
		}
	}
	walk(make([]uint8, 0, k), 0)
	return out
}

// seed restarts the dealer's stream.
func (d *dealer) seed(seed1, seed2 uint64) {
	d.src.Seed(seed1, seed2)
	d.has = false
}

// word returns the next 32 uniform bits: each 64-bit output of the
// generator serves two words, low half first.
func (d *dealer) word() uint32 {
	if d.has {
		d.has = false
		return d.spare
	}
	out := d.src.Uint64()
	d.spare, d.has = uint32(out>>32), true
	return uint32(out)
}

// pick draws the index of a block size, uniformly among the scheme's.
//
// A draw uniform in [0, n) from a word x is the high half of x·n, exact
// by Lemire's method: x is rejected, and a fresh word taken, when the low
// half of x·n falls below 2^32 mod n (rare for small n). A batch draws
// several: successive high halves of x·r1, then of the low half times r2,
// … are the mixed-radix digits of ⌊x·prod / 2^32⌋ (prod = r1·r2·…), and
// the last low half is x·prod mod 2^32, so rejecting x by the batch's
// threshold makes the digits independent uniform draws.
func (d *dealer) pick() int {
	nb := uint32(len(d.blocks))
	if nb == 1 {
		return 0
	}
	m := uint64(d.word()) * uint64(nb)
	if uint32(m) < nb {
		for thresh := -nb % nb; uint32(m) < thresh; {
			m = uint64(d.word()) * uint64(nb)
		}
	}
	return int(m >> 32)
}

// fill deals a block of size index bi into dst: the block's ratio list
// in a uniformly random order, so every block is an exact permutation of
// the ratio. Blocks of at most tableMax slots take one draw from [0, n!)
// whose digits pick a subset and two orders from tables; larger ones are
// shuffled by the inside-out Fisher–Yates algorithm.
func (d *dealer) fill(bi int, dst []int32) {
	b := &d.blocks[bi]
	ratio := b.ratio
	dst = dst[:len(ratio)]
	if b.tab {
		x := d.word()
		for x*b.fact < b.reject {
			x = d.word()
		}
		n, h := len(ratio), b.h
		m := uint64(x) * uint64(b.nsub)
		sub := b.subsets[int(m>>32)*n:][:n]
		m = uint64(uint32(m)) * uint64(b.f1)
		o1 := d.perms[h][int(m>>32)*h:][:h]
		m = uint64(uint32(m)) * uint64(b.f2)
		o2 := d.perms[n-h][int(m>>32)*(n-h):][:n-h]
		for e, p := range o1 {
			dst[sub[p]] = ratio[e]
		}
		rest, tail := sub[h:], ratio[h:]
		for e, p := range o2 {
			dst[rest[p]] = tail[e]
		}
		return
	}
	dst[0] = ratio[0]
	var x uint32
	for k, st := range b.steps {
		if st.fresh {
			x = d.word()
			for x*st.prod < st.reject {
				x = d.word()
			}
		}
		m := uint64(x) * uint64(st.rng)
		j, i := m>>32, k+1
		x = uint32(m)
		dst[i] = dst[j]
		dst[j] = ratio[i]
	}
}

// next deals the next block into dst (which must hold the largest block)
// and returns the index of its size among the scheme's.
func (d *dealer) next(dst []int32) int {
	bi := d.pick()
	d.fill(bi, dst)
	return bi
}

// maxBlock is the largest block size of the dealer's scheme.
func (d *dealer) maxBlock() int {
	m := 0
	for _, b := range d.blocks {
		m = max(m, len(b.ratio))
	}
	return m
}

// drawSeed derives the seed of re-draw d from the master seed: fresh seeds,
// unrelated to the study's own, and reproducible from the master seed
// whatever the number of workers.
func drawSeed(master uint64, d int) (uint64, uint64) {
	var b [len("trialogue/ri/v2") + 16]byte
	n := copy(b[:], "trialogue/ri/v2")
	binary.BigEndian.PutUint64(b[n:], master)
	binary.BigEndian.PutUint64(b[n+8:], uint64(d))
	h := sha256.Sum256(b[:])
	return binary.BigEndian.Uint64(h[:8]), binary.BigEndian.Uint64(h[8:16])
}

// riStratum is one stratum of the re-draws: its analysed respondents'
// values in the order of the stratum's slots, so that a re-draw deals the
// stratum's arms into slot order and then adds each slot's values to its
// arm's sums in one sequential pass.
type riStratum struct {
	key  string
	need int       // slots to deal: one past the last analysed respondent's
	v    []float64 // need × dv values; zeros where no one is analysed
	// delta lists the slots below need that do not hold exactly one
	// analysed respondent, with the number they hold minus one: a slot's
	// arm gets one count per slot dealt, corrected by these.
	delta []slotDelta
}

// slotDelta corrects the count of the arm dealt to a slot.
type slotDelta struct {
	slot int32
	d    float64
}

// riStat is a statistic computed from the count and the sums of a short
// vector of values per respondent, per stratum and group: cell c holds the
// count in c[0] and the sums of the dv values in c[1:].
type riStat struct {
	dv   int
	v    func(i int, dst []float64) // respondent i's values
	est  func(cells [][]float64) ([]float64, error)
	same bool // the statistic is the reported estimate (checked on the observed data)
}

// newRIStat prepares the statistic. For none and pre it is the reported
// estimate itself, from a partitioned regression: with W the intercept and
// additive columns (fixed under re-draws) and D the arm indicators,
// τ = (D'D − D'W (W'W)⁻¹ W'D)⁻¹ (D'y − D'W (W'W)⁻¹ W'y), which needs per
// group only the counts per stratum (the stratum indicators' sums) and the
// sums of pre and y. For Lin, whose estimate needs per group the sums of
// the covariates' squares and products, it is the difference between each
// treatment arm's and the control's mean residual from the regression of
// the outcome on the covariates and stratum indicators alone, fitted once
// (Rosenbaum's covariance-adjusted randomization test): under the sharp
// null the outcomes, hence the residuals, do not depend on the assignment,
// so any statistic gives a valid test of that null.
func (s *sample) newRIStat() (*riStat, error) {
	adj, _ := s.adjusters()
	n := len(s.y)
	k := s.groups - 1
	nst := len(s.strata)
	if s.spec.Adjust == AdjustLin {
		x := mat.NewDense(n, 1+len(adj), nil)
		for i := range n {
			row := x.RawRowView(i)
			row[0] = 1
			for j, c := range adj {
				row[1+j] = c[i]
			}
		}
		var qr mat.QR
		qr.Factorize(x)
		var b mat.VecDense
		if err := qr.SolveVecTo(&b, false, mat.NewVecDense(n, s.y)); err != nil {
			return nil, fmt.Errorf("randomization inference: residualize the outcome: %w", err)
		}
		var fitted mat.VecDense
		fitted.MulVec(x, &b)
		resid := make([]float64, n)
		for i := range resid {
			resid[i] = s.y[i] - fitted.AtVec(i)
		}
		return &riStat{
			dv: 1,
			v:  func(i int, dst []float64) { dst[0] = resid[i] },
			est: func(cells [][]float64) ([]float64, error) {
				var cnt, sum [2]float64
				tau := make([]float64, k)
				for g := range k + 1 {
					cnt[0], sum[0] = 0, 0
					for st := range nst {
						c := cells[st*(k+1)+g]
						cnt[0] += c[0]
						sum[0] += c[1]
					}
					if cnt[0] == 0 {
						return nil, fmt.Errorf("a group has no respondents")
					}
					if g == 0 {
						cnt[1], sum[1] = cnt[0], sum[0]
						continue
					}
					tau[g-1] = sum[0]/cnt[0] - sum[1]/cnt[1]
				}
				return tau, nil
			},
		}, nil
	}
	// W: intercept, [pre], stratum indicators; the stratum indicator of
	// stratum st is column col[st] of W, or none (-1) for the first present
	// stratum and in an unstratified analysis.
	hasPre := s.spec.Adjust == AdjustPre
	q := 1 + len(adj)
	col := make([]int, nst)
	for st := range col {
		col[st] = -1
	}
	if s.nStrata > 1 {
		present := make([]bool, nst)
		for _, st := range s.stratum {
			present[st] = true
		}
		next := 1
		if hasPre {
			next = 2
		}
		first := true
		for st, ok := range present {
			if !ok {
				continue
			}
			if first {
				first = false
				continue
			}
			col[st] = next
			next++
		}
		if next != q {
			return nil, fmt.Errorf("randomization inference: %d stratum columns, want %d", next, q)
		}
	}
	wtw := mat.NewSymDense(q, nil)
	wty := make([]float64, q)
	w := make([]float64, q)
	for i := range n {
		w[0] = 1
		for j, c := range adj {
			w[1+j] = c[i]
		}
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
	rs := &riStat{dv: 1, same: true}
	if hasPre {
		rs.dv = 2
		rs.v = func(i int, dst []float64) { dst[0], dst[1] = s.pre[i], s.y[i] }
	} else {
		rs.v = func(i int, dst []float64) { dst[0] = s.y[i] }
	}
	rs.est = func(cells [][]float64) ([]float64, error) {
		// Per treatment group: its row of D'W and its entry of D'y.
		dw := mat.NewDense(k, q, nil)
		lhs := mat.NewDense(k, k, nil)
		rhs := mat.NewVecDense(k, nil)
		for g := 1; g <= k; g++ {
			row := dw.RawRowView(g - 1)
			ysum := 0.0
			for st := range nst {
				c := cells[st*(k+1)+g]
				row[0] += c[0]
				if hasPre {
					row[1] += c[1]
				}
				if col[st] >= 0 {
					row[col[st]] += c[0]
				}
				ysum += c[rs.dv]
			}
			lhs.Set(g-1, g-1, row[0])
			rhs.SetVec(g-1, ysum-mat.Dot(dw.RowView(g-1), &wa))
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
	return rs, nil
}

// randomization returns, for each treatment arm, the randomization-
// inference p-value of the sharp null of no effect for anyone: the share of
// re-draws of the study's scheme (same strata, same block sizes, fresh
// seeds; each respondent keeps their stratum and slot) whose statistic is
// at least as far from zero as the observed one, counting the observed
// assignment as one draw: (1 + #{|τ*| ≥ |τ|}) / (1 + N). The statistic is
// the reported estimate for none and pre, and the difference in mean
// covariate-adjusted residuals for Lin (see newRIStat).
//
// It returns the p-values and the statistic on the observed assignment,
// and whether that statistic is the reported estimate. Setting stop makes
// it return early with errRIStopped.
func (s *sample) randomization(d *design, stop *atomic.Bool) (p, obs []float64, same bool, err error) {
	rs, err := s.newRIStat()
	if err != nil {
		return nil, nil, false, err
	}
	sc := d.study.Scheme()
	k := s.groups - 1
	nst := len(s.strata)
	armGroup := make([]int, len(sc.Arms))
	for a, r := range sc.Arms {
		armGroup[a] = d.armGroup[r.Arm]
	}
	// The analysed respondents of each stratum, in slot order.
	dz := 1 + rs.dv
	strata := make([]*riStratum, nst)
	var counts [][]float64 // per stratum, respondents per slot
	for i, ui := range s.units {
		u := d.units[ui]
		if u.Slot < 0 || u.Slot >= math.MaxInt32 {
			return nil, nil, false, fmt.Errorf("randomization inference: session %s has slot %d", u.RID, u.Slot)
		}
		st := s.stratum[i]
		if strata[st] == nil {
			strata[st] = &riStratum{key: s.strata[st]}
		}
		strata[st].need = max(strata[st].need, u.Slot+1)
	}
	counts = make([][]float64, nst)
	for st, x := range strata {
		if x != nil {
			x.v = make([]float64, x.need*rs.dv)
			counts[st] = make([]float64, x.need)
		}
	}
	cells := make([][]float64, nst*(k+1))
	for c := range cells {
		cells[c] = make([]float64, dz)
	}
	v := make([]float64, rs.dv)
	for i, ui := range s.units {
		st, slot := s.stratum[i], d.units[ui].Slot
		rs.v(i, v)
		// Two respondents on one slot would share its arm: their values add.
		counts[st][slot]++
		for j, x := range v {
			strata[st].v[slot*rs.dv+j] += x
		}
		// The observed assignment's cells.
		c := cells[st*(k+1)+s.group[i]]
		c[0]++
		for j, x := range v {
			c[1+j] += x
		}
	}
	for st, x := range strata {
		if x == nil {
			continue
		}
		for slot, c := range counts[st] {
			if c != 1 {
				x.delta = append(x.delta, slotDelta{int32(slot), c - 1})
			}
		}
	}
	obs, err = rs.est(cells)
	if err != nil {
		return nil, nil, false, fmt.Errorf("randomization inference: %w", err)
	}
	// Strata in key order, so that a re-draw's stream does not depend on
	// the order of the respondents.
	var order []int
	maxNeed := 0
	for st, x := range strata {
		if x != nil {
			order = append(order, st)
			maxNeed = max(maxNeed, x.need)
		}
	}
	slices.SortFunc(order, func(a, b int) int { return strings.Compare(strata[a].key, strata[b].key) })
	n := s.spec.Permutations
	workers := min(runtime.GOMAXPROCS(0), n)
	hits := make([][]int, workers)
	var wg sync.WaitGroup
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			cnt := make([]int, k)
			dl := newDealer(sc)
			seq := make([]int32, maxNeed+dl.maxBlock())
			armAcc := make([]float64, len(sc.Arms)*dz)
			cells := make([][]float64, nst*(k+1))
			for c := range cells {
				cells[c] = make([]float64, dz)
			}
			for draw := w; draw < n; draw += workers {
				if stop.Load() {
					return
				}
				dl.seed(drawSeed(s.spec.Seed, draw))
				for _, c := range cells {
					clear(c)
				}
				for _, st := range order {
					x := strata[st]
					clear(armAcc)
					dl.deal(seq, x, rs.dv, armAcc)
					base := st * (k + 1)
					for a, g := range armGroup {
						c := cells[base+g]
						for j := range dz {
							c[j] += armAcc[a*dz+j]
						}
					}
				}
				tau, err := rs.est(cells)
				if err != nil {
					// A re-draw can leave a group empty or the regression
					// unsolvable; it then counts as at least as extreme,
					// which is conservative.
					for j := range cnt {
						cnt[j]++
					}
					continue
				}
				for j, v := range tau {
					if !(math.Abs(v) < math.Abs(obs[j])*(1-1e-12)) {
						cnt[j]++
					}
				}
			}
			hits[w] = cnt
		}()
	}
	wg.Wait()
	if stop.Load() {
		return nil, nil, false, errRIStopped
	}
	out := make([]float64, k)
	for j := range out {
		c := 0
		for w := range workers {
			c += hits[w][j]
		}
		out[j] = float64(1+c) / float64(1+n)
	}
	return out, obs, rs.same, nil
}

// errRIStopped is randomization's answer when told to stop.
var errRIStopped = errors.New("randomization inference stopped")

// deal deals blocks over the stratum's first need slots into seq (which
// must hold need plus the largest block) and adds, per arm a, the count of
// analysed respondents to acc[a·(1+dv)] and the sums of their dv values to
// the entries after it.
func (d *dealer) deal(seq []int32, st *riStratum, dv int, acc []float64) {
	// Draw the block sizes first, then deal the blocks of each size
	// together: the work of a block depends on its size, and blocks of
	// one size after another keep the processor's branch predictions
	// right. The last block may run past need.
	for bi := range d.starts {
		d.starts[bi] = d.starts[bi][:0]
	}
	filled := 0
	for filled < st.need {
		bi := d.pick()
		d.starts[bi] = append(d.starts[bi], int32(filled))
		filled += len(d.blocks[bi].ratio)
	}
	for bi, starts := range d.starts {
		for _, at := range starts {
			d.fill(bi, seq[at:])
		}
	}
	dz := 1 + dv
	// Counts: each arm's share of every block dealt, less the slots past
	// need, corrected by the slots that hold no one or several.
	for bi, b := range d.blocks {
		nb := len(d.starts[bi])
		if nb == 0 {
			continue
		}
		start := 0
		for a, end := range b.ends {
			acc[a*dz] += float64(nb * (end - start))
			start = end
		}
	}
	for _, a := range seq[st.need:filled] {
		acc[int(a)*dz]--
	}
	for _, x := range st.delta {
		acc[int(seq[x.slot])*dz] += x.d
	}
	// Sums: one pass in slot order, alternating two banks of sums so that
	// consecutive slots of one arm do not wait on each other.
	arms := len(acc) / dz
	seq = seq[:st.need]
	switch dv {
	case 1:
		var bank [2][maxFastArms]float64
		if arms > maxFastArms {
			break
		}
		v := st.v[:len(seq)]
		i := 0
		for ; i+1 < len(seq); i += 2 {
			bank[0][seq[i]&(maxFastArms-1)] += v[i]
			bank[1][seq[i+1]&(maxFastArms-1)] += v[i+1]
		}
		if i < len(seq) {
			bank[0][seq[i]&(maxFastArms-1)] += v[i]
		}
		for a := range arms {
			acc[a*dz+1] += bank[0][a] + bank[1][a]
		}
		return
	case 2:
		var bank [2][2 * maxFastArms]float64
		if arms > maxFastArms {
			break
		}
		v := st.v[:2*len(seq)]
		i := 0
		for ; i+1 < len(seq); i += 2 {
			a, b := 2*(seq[i]&(maxFastArms-1)), 2*(seq[i+1]&(maxFastArms-1))
			bank[0][a] += v[2*i]
			bank[0][a+1] += v[2*i+1]
			bank[1][b] += v[2*i+2]
			bank[1][b+1] += v[2*i+3]
		}
		if i < len(seq) {
			a := 2 * (seq[i] & (maxFastArms - 1))
			bank[0][a] += v[2*i]
			bank[0][a+1] += v[2*i+1]
		}
		for a := range arms {
			acc[a*dz+1] += bank[0][2*a] + bank[1][2*a]
			acc[a*dz+2] += bank[0][2*a+1] + bank[1][2*a+1]
		}
		return
	}
	for i, a := range seq {
		src := st.v[i*dv:][:dv]
		dst := acc[int(a)*dz+1:][:dv]
		for j, x := range src {
			dst[j] += x
		}
	}
}

// maxFastArms bounds the schemes whose sums use the fixed-size banks of
// deal (a power of two, so that masking an arm index proves it in range).
const maxFastArms = 16
