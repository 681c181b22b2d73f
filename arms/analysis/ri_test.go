package analysis

import (
	"fmt"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"gonum.org/v1/gonum/mat"
	"gonum.org/v1/gonum/stat/distuv"

	"trialogue/arms"
	"trialogue/arms/assign"
)

// dealSchemes are schemes with equal and unequal ratios, one and several
// block sizes, and blocks whose shuffle needs one, two and many batches of
// draws.
func dealSchemes(t *testing.T) map[string]assign.Scheme {
	t.Helper()
	demo, _, err := arms.ParseFile("../../testdata/demo-study.yaml")
	if err != nil {
		t.Fatal(err)
	}
	weighted := assign.Scheme{Arms: []assign.Ratio{{Arm: "a", Weight: 2}, {Arm: "b", Weight: 1}, {Arm: "c", Weight: 1}}, Blocks: []int{4, 8, 24, 300}}
	single := assign.Scheme{Arms: []assign.Ratio{{Arm: "a", Weight: 1}, {Arm: "b", Weight: 2}}, Blocks: []int{3}}
	ones := assign.Scheme{Arms: []assign.Ratio{{Arm: "a", Weight: 1}}, Blocks: []int{1}}
	out := map[string]assign.Scheme{"fixture": fixtureStudy(t, false).Scheme(), "demo": demo.Scheme(), "weighted": weighted, "single": single, "one-arm": ones}
	for name, sc := range out {
		if err := sc.Validate(); err != nil {
			t.Fatalf("%s: %v", name, err)
		}
	}
	return out
}

// checkBlock reports whether block is an exact permutation of the ratio of
// one of the scheme's block sizes.
func checkBlock(sc assign.Scheme, block []int32) error {
	sum := 0
	for _, r := range sc.Arms {
		sum += r.Weight
	}
	if !slices.Contains(sc.Blocks, len(block)) {
		return fmt.Errorf("block of %d slots, want one of %v", len(block), sc.Blocks)
	}
	count := make([]int, len(sc.Arms))
	for _, a := range block {
		count[a]++
	}
	for a, r := range sc.Arms {
		if want := r.Weight * len(block) / sum; count[a] != want {
			return fmt.Errorf("block %v: arm %s %d times, want %d", block, r.Arm, count[a], want)
		}
	}
	return nil
}

func TestDealerBlocksArePermutationsOfTheRatio(t *testing.T) {
	for name, sc := range dealSchemes(t) {
		t.Run(name, func(t *testing.T) {
			d := newDealer(sc)
			buf := make([]int32, d.maxBlock())
			sizes := map[int]int{}
			for seed := range uint64(20) {
				d.seed(drawSeed(seed, 3))
				for range 200 {
					bi := d.next(buf)
					block := buf[:sc.Blocks[bi]]
					if err := checkBlock(sc, block); err != nil {
						t.Fatalf("seed %d: %v", seed, err)
					}
					sizes[len(block)]++
				}
			}
			for _, b := range sc.Blocks {
				if sizes[b] == 0 {
					t.Errorf("block size %d never drawn in 4,000 blocks", b)
				}
			}
		})
	}
}

// TestDealerIsUniform checks by chi-square tests (with fixed seeds, so the
// outcome is fixed) that blocks of four and of seven distinct arms take
// each of their orders equally often, that in blocks of 24 (six batches of draws) every
// arm is equally likely at every position, and that block sizes are drawn
// equally often.
func TestDealerIsUniform(t *testing.T) {
	// Blocks of four come from one table of orders; blocks of seven from a
	// table of subsets and two of orders.
	for _, size := range []int{4, 7} {
		t.Run(fmt.Sprintf("OKOrdersOf%d", size), func(t *testing.T) {
			var ar []assign.Ratio
			orders := 1
			for a := range size {
				ar = append(ar, assign.Ratio{Arm: fmt.Sprint(a), Weight: 1})
				orders *= a + 1
			}
			d := newDealer(assign.Scheme{Arms: ar, Blocks: []int{size}})
			d.seed(1, 2)
			buf := make([]int32, size)
			n := 40 * orders
			freq := map[string]float64{}
			for range n {
				d.next(buf)
				freq[fmt.Sprint(buf)]++
			}
			if len(freq) != orders {
				t.Fatalf("got %d distinct orders, want %d", len(freq), orders)
			}
			stat := 0.0
			for _, f := range freq {
				stat += (f - 40) * (f - 40) / 40
			}
			if p := (distuv.ChiSquared{K: float64(orders - 1)}).Survival(stat); p < 1e-3 {
				t.Errorf("orders of %d: chi-square %.1f on %d df, p = %.2g; want uniform", size, stat, orders-1, p)
			}
		})
	}
	t.Run("OKPositionsOfTwentyFour", func(t *testing.T) {
		var ar []assign.Ratio
		for a := range 24 {
			ar = append(ar, assign.Ratio{Arm: fmt.Sprint(a), Weight: 1})
		}
		sc := assign.Scheme{Arms: ar, Blocks: []int{24, 48}}
		d := newDealer(sc)
		fresh := 0
		for _, st := range d.blocks[0].steps {
			if st.fresh {
				fresh++
			}
		}
		if fresh != 6 {
			t.Fatalf("blocks of 24 take %d words for their 23 draws, want 6", fresh)
		}
		d.seed(3, 4)
		buf := make([]int32, 48)
		table := make([][]float64, 24)
		for p := range table {
			table[p] = make([]float64, 24)
		}
		sizes := [2]float64{}
		for range 20000 {
			bi := d.next(buf)
			sizes[bi]++
			if bi == 0 {
				for p, a := range buf[:24] {
					table[p][a]++
				}
			}
		}
		cs, err := Independence(table)
		if err != nil {
			t.Fatal(err)
		}
		if cs.P < 1e-3 {
			t.Errorf("arm by position: chi-square %.1f on %d df, p = %.2g; want uniform", cs.Stat, cs.DF, cs.P)
		}
		stat := (sizes[0] - sizes[1]) * (sizes[0] - sizes[1]) / (sizes[0] + sizes[1])
		if p := (distuv.ChiSquared{K: 1}).Survival(stat); p < 1e-3 {
			t.Errorf("block sizes: %v, p = %.2g; want equal", sizes, p)
		}
	})
}

// TestDealStratum checks the re-draw's hot path: the blocks it deals tile
// the stratum's slots from the first, each an exact permutation of the
// ratio (the last one too, though it may run past the respondents); and
// the per-arm counts and sums it returns are those of the slots dealt to
// each arm, with empty and doubly occupied slots counted as they are.
func TestDealStratum(t *testing.T) {
	rng := rand.New(rand.NewPCG(5, 6))
	for name, sc := range dealSchemes(t) {
		for _, dv := range []int{1, 2, 3} {
			t.Run(fmt.Sprintf("%s/dv%d", name, dv), func(t *testing.T) {
				d := newDealer(sc)
				for trial := range 5 {
					need := 1 + rng.IntN(700)
					st := &riStratum{need: need, v: make([]float64, need*dv)}
					held := make([]float64, need)
					for slot := range need {
						switch r := rng.IntN(10); {
						case r == 0 && slot != need-1:
							held[slot] = 0
						case r == 1:
							held[slot] = 2
						default:
							held[slot] = 1
						}
						if held[slot] != 1 {
							st.delta = append(st.delta, slotDelta{int32(slot), held[slot] - 1})
						}
						for j := range dv {
							if held[slot] > 0 {
								st.v[slot*dv+j] = math.Round(rng.NormFloat64()*1000) / 8
							}
						}
					}
					seq := make([]int32, need+d.maxBlock())
					acc := make([]float64, len(sc.Arms)*(1+dv))
					d.seed(uint64(trial), 77)
					d.deal(seq, st, dv, acc)

					size := map[int32]int{}
					var starts []int32
					for bi, at := range d.starts {
						for _, s := range at {
							size[s] = sc.Blocks[bi]
							starts = append(starts, s)
						}
					}
					slices.Sort(starts)
					end := int32(0)
					for _, s := range starts {
						if s != end {
							t.Fatalf("trial %d: a block starts at slot %d, want %d", trial, s, end)
						}
						end += int32(size[s])
						if err := checkBlock(sc, seq[s:end]); err != nil {
							t.Fatalf("trial %d, block at slot %d: %v", trial, s, err)
						}
					}
					if int(end) < need || int(end)-size[starts[len(starts)-1]] >= need {
						t.Fatalf("trial %d: blocks cover %d slots for %d", trial, end, need)
					}
					want := make([]float64, len(acc))
					for slot, a := range seq[:need] {
						w := want[int(a)*(1+dv):][:1+dv]
						w[0] += held[slot]
						for j := range dv {
							w[1+j] += st.v[slot*dv+j]
						}
					}
					for i := range acc {
						if math.Abs(acc[i]-want[i]) > 1e-9*math.Max(1, math.Abs(want[i])) {
							t.Fatalf("trial %d: arm sums %v, want %v", trial, acc, want)
						}
					}
				}
			})
		}
	}
}

// TestRandomizationAgreesWithPlan compares the fast re-draws with a slow
// reference path: re-draws through assign.Plan (the study's own, audited
// generator) with fresh seeds, each re-estimated from scratch (the full
// regression for none and pre; the residuals of an independent fit for
// Lin). The p-values must agree within Monte Carlo error: 4.5 standard
// errors of the difference of two independent estimates of one p.
func TestRandomizationAgreesWithPlan(t *testing.T) {
	st := fixtureStudy(t, false)
	units, tab := fixture(t, st, 400, 11)
	// Smaller planted effects than the fixture's, so that the p-values
	// are moderate and their agreement is informative.
	post := 2
	for i, u := range units {
		if tab.Rows[i][post] == "" {
			continue
		}
		var y float64
		fmt.Sscan(tab.Rows[i][post], &y)
		y -= fixtureEffects[u.Arm] * 0.8
		tab.Rows[i][post] = fmt.Sprint(y)
	}
	const fast, slow = 4000, 600
	for _, adjust := range []string{AdjustNone, AdjustPre, AdjustLin} {
		t.Run("OK"+adjust, func(t *testing.T) {
			spec := Spec{ID: "rid", Outcome: "post", Pre: "pre", Adjust: adjust, Covariates: []string{"age", "stance"},
				Control: fixtureControl, Permutations: fast, Seed: 3}
			rep, err := Analyze(st, units, tab, spec)
			if err != nil {
				t.Fatal(err)
			}
			want := RIEstimate
			if adjust == AdjustLin {
				want = RIResidualMeans
			}
			if rep.RIStatistic != want {
				t.Errorf("got RI statistic %q, want %q", rep.RIStatistic, want)
			}
			d, err := prepare(st, units, tab, spec)
			if err != nil {
				t.Fatal(err)
			}
			s, err := d.sample(tab)
			if err != nil {
				t.Fatal(err)
			}
			stat := referenceStatistic(t, s)
			obs := stat(s.group)
			k := s.groups - 1
			hits := make([]int, k)
			group := make([]int, len(s.group))
			for r := range slow {
				plan, err := assign.NewPlan([]byte(fmt.Sprintf("reference-re-draw-%06d", r)), st.Scheme())
				if err != nil {
					t.Fatal(err)
				}
				for i, ui := range s.units {
					u := d.units[ui]
					group[i] = d.armGroup[plan.Slot(u.Stratum, u.Slot).Arm]
				}
				for j, v := range stat(group) {
					if math.Abs(v) >= math.Abs(obs[j])*(1-1e-12) {
						hits[j]++
					}
				}
			}
			for j, e := range rep.Effects {
				ref := float64(1+hits[j]) / float64(1+slow)
				p := (e.PRI + ref) / 2
				se := math.Sqrt(max(p*(1-p), 0.01) * (1.0/fast + 1.0/slow))
				if math.Abs(e.PRI-ref) > 4.5*se {
					t.Errorf("%s: p_ri %.4f from %d fast re-draws, %.4f from %d re-draws of assign.Plan: differ by more than 4.5 × %.4f",
						e.Arm, e.PRI, fast, ref, slow, se)
				}
				t.Logf("%s %s: p_ri %.4f, reference %.4f, t-test p %.4f", adjust, e.Arm, e.PRI, ref, e.P)
			}
		})
	}
}

// referenceStatistic returns the randomization test's statistic as a
// function of the grouping, computed from scratch: for none and pre, the
// regression's arm coefficients; for Lin, each arm's mean residual minus
// the control's, the residuals from OLS of the outcome on the covariates
// and stratum indicators.
func referenceStatistic(t *testing.T, s *sample) func(group []int) []float64 {
	t.Helper()
	k := s.groups - 1
	if s.spec.Adjust != AdjustLin {
		return func(group []int) []float64 {
			c := *s
			c.group = group
			fit, _, err := c.fit()
			if err != nil {
				t.Fatal(err)
			}
			return slices.Clone(fit.Coef[1 : 1+k])
		}
	}
	adj, _ := s.adjusters()
	n := len(s.y)
	x := mat.NewDense(n, 1+len(adj), nil)
	for i := range n {
		x.Set(i, 0, 1)
		for j, c := range adj {
			x.Set(i, 1+j, c[i])
		}
	}
	fit, err := OLS(x, s.y, nil)
	if err != nil {
		t.Fatal(err)
	}
	resid := make([]float64, n)
	for i := range n {
		resid[i] = s.y[i] - mat.Dot(x.RowView(i), mat.NewVecDense(len(fit.Coef), fit.Coef))
	}
	return func(group []int) []float64 {
		sum := make([]float64, k+1)
		cnt := make([]float64, k+1)
		for i, g := range group {
			sum[g] += resid[i]
			cnt[g]++
		}
		out := make([]float64, k)
		for g := 1; g <= k; g++ {
			out[g-1] = sum[g]/cnt[g] - sum[0]/cnt[0]
		}
		return out
	}
}
