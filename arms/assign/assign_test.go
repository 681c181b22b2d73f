package assign

import (
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"math"
	"math/big"
	"math/rand/v2"
	"os"
	"path/filepath"
	"reflect"
	"strings"
	"sync"
	"testing"
)

// Schemes under test: a 1:1:2 ratio, and six equal arms as in the demo study.
var (
	schemeThree = Scheme{Arms: []Ratio{{"a", 1}, {"b", 1}, {"c", 2}}, Blocks: []int{4, 8}}
	schemeSix   = Scheme{
		Arms:   []Ratio{{"notice", 1}, {"letter", 1}, {"tailored", 1}, {"debate", 1}, {"reflect", 1}, {"chit-chat", 1}},
		Blocks: []int{6, 12},
	}
)

// testSeed derives a deterministic 32-byte seed from a label.
func testSeed(label string) []byte {
	s := sha256.Sum256([]byte("trialogue assign test seed: " + label))
	return s[:]
}

func mustPlan(tb testing.TB, seed []byte, s Scheme) *Plan {
	tb.Helper()
	p, err := NewPlan(seed, s)
	if err != nil {
		tb.Fatalf("NewPlan: %v", err)
	}
	return p
}

func weights(s Scheme) (map[string]int, int) {
	w := make(map[string]int)
	sum := 0
	for _, r := range s.Arms {
		w[r.Arm] = r.Weight
		sum += r.Weight
	}
	return w, sum
}

// TestBlocksAndBalance checks the defining properties of permuted blocks
// (Rosenberger & Lachin, "Randomization in Clinical Trials", ch. 3, from
// memory: each block holds each arm exactly its ratio share, so imbalance is
// bounded by the block size) on 3 strata of 400 slots per scheme.
func TestBlocksAndBalance(t *testing.T) {
	for name, s := range map[string]Scheme{"ThreeArms": schemeThree, "SixArms": schemeSix} {
		t.Run(name, func(t *testing.T) {
			w, sum := weights(s)
			maxBlock := 0
			for _, b := range s.Blocks {
				maxBlock = max(maxBlock, b)
			}
			allowed := make(map[int]bool)
			for _, b := range s.Blocks {
				allowed[b] = true
			}
			p := mustPlan(t, testSeed(name), s)
			for _, stratum := range []string{"lean=left", "lean=centre", "lean=right"} {
				seq := p.Sequence(stratum, 400)
				if len(seq) != 400 {
					t.Fatalf("%s: got %d slots, want 400", stratum, len(seq))
				}
				counts := make(map[string]int)
				blockCounts := make(map[string]int)
				for i, sl := range seq {
					if sl.Index != i {
						t.Fatalf("%s slot %d: got Index %d", stratum, i, sl.Index)
					}
					if !allowed[sl.BlockSize] {
						t.Fatalf("%s slot %d: block size %d not in scheme %v", stratum, i, sl.BlockSize, s.Blocks)
					}
					if sl.Position == 0 {
						clear(blockCounts)
						if i > 0 && seq[i-1].Block+1 != sl.Block {
							t.Fatalf("%s slot %d: block %d follows block %d", stratum, i, sl.Block, seq[i-1].Block)
						}
					} else if sl.Block != seq[i-1].Block || sl.Position != seq[i-1].Position+1 || sl.BlockSize != seq[i-1].BlockSize {
						t.Fatalf("%s slot %d: %+v does not continue %+v", stratum, i, sl, seq[i-1])
					}
					counts[sl.Arm]++
					blockCounts[sl.Arm]++
					if sl.Position == sl.BlockSize-1 { // block complete: exact permutation of the ratio
						for arm, wt := range w {
							if want := wt * sl.BlockSize / sum; blockCounts[arm] != want {
								t.Errorf("%s block %d: arm %s got %d, want %d", stratum, sl.Block, arm, blockCounts[arm], want)
							}
						}
					}
					prefix := i + 1
					for arm, wt := range w {
						dev := math.Abs(float64(counts[arm]) - float64(wt)/float64(sum)*float64(prefix))
						if dev > float64(maxBlock)/2 {
							t.Errorf("%s prefix %d: arm %s count %d deviates %.2f > %d", stratum, prefix, arm, counts[arm], dev, maxBlock/2)
						}
					}
				}
			}
		})
	}
}

// TestReproducible checks Principle 2 of DESIGN.md: the sequence is a pure
// function of seed and stratum, whatever order slots were asked in.
func TestReproducible(t *testing.T) {
	seed := testSeed("reproducible")
	first := mustPlan(t, seed, schemeThree).Sequence("lean=left", 400)

	fresh := mustPlan(t, seed, schemeThree)
	for i := 399; i >= 0; i -= 37 { // out of order, from a fresh Plan
		if got := fresh.Slot("lean=left", i); got != first[i] {
			t.Fatalf("slot %d: got %+v, want %+v", i, got, first[i])
		}
	}
	if got := mustPlan(t, seed, schemeThree).Sequence("lean=left", 400); !reflect.DeepEqual(got, first) {
		t.Fatal("a fresh Plan with the same seed gave a different sequence")
	}
	// A caller's later edits to its seed or scheme must not reach the plan.
	seedCopy := append([]byte(nil), seed...)
	s := Scheme{Arms: append([]Ratio(nil), schemeThree.Arms...), Blocks: append([]int(nil), schemeThree.Blocks...)}
	p := mustPlan(t, seedCopy, s)
	seedCopy[0] ^= 0xff
	s.Arms[0].Arm = "changed"
	s.Blocks[0] = 400
	if got := p.Sequence("lean=left", 400); !reflect.DeepEqual(got, first) {
		t.Fatal("editing the seed or scheme after NewPlan changed the sequence")
	}

	arms := func(seq []Slot) string {
		var b strings.Builder
		for _, sl := range seq {
			b.WriteString(sl.Arm)
		}
		return b.String()
	}
	// Different strata and seeds give different sequences. 400 slots of a
	// 1:1:2 ratio admit far more than 2^100 sequences, so equality would
	// mean the key does not depend on its input.
	other := mustPlan(t, seed, schemeThree).Sequence("lean=right", 400)
	if arms(other) == arms(first) {
		t.Error("strata lean=left and lean=right have the same sequence")
	}
	otherSeed := mustPlan(t, testSeed("reproducible-2"), schemeThree).Sequence("lean=left", 400)
	if arms(otherSeed) == arms(first) {
		t.Error("two seeds give the same sequence")
	}
}

// Critical values of the chi-square distribution at alpha = 0.001, from
// memory of the NIST/SEMATECH e-Handbook of Statistical Methods, section
// 1.3.6.7.4 "Critical Values of the Chi-Square Distribution" (upper tail).
const (
	chi2df2p001 = 13.816
	chi2df5p001 = 20.515
)

// TestChi2TableValue checks the df=2 value copied from memory against its
// closed form: for 2 degrees of freedom the upper tail is exp(-x/2), so the
// critical value is -2 ln(alpha) (any statistics text, e.g. the e-Handbook
// section 1.3.6.6.6 on the chi-square distribution).
func TestChi2TableValue(t *testing.T) {
	if got := -2 * math.Log(0.001); math.Abs(got-chi2df2p001) > 0.0005 {
		t.Errorf("df=2 critical value: closed form %.4f, table %.3f", got, chi2df2p001)
	}
}

func chiSquare(counts map[string]int, s Scheme, n int) float64 {
	w, sum := weights(s)
	stat := 0.0
	for arm, wt := range w {
		e := float64(n) * float64(wt) / float64(sum)
		d := float64(counts[arm]) - e
		stat += d * d / e
	}
	return stat
}

// TestArmFrequencies is a goodness-of-fit test: over 2,000 fixed seeds, the
// arm at a fixed slot follows the ratio (a correct scheme fails this test
// with probability 0.001 per position; the seeds are fixed, so the result
// is deterministic).
func TestArmFrequencies(t *testing.T) {
	const seeds = 2000
	cases := []struct {
		name     string
		s        Scheme
		critical float64
	}{
		{"ThreeArms", schemeThree, chi2df2p001},
		{"SixArms", schemeSix, chi2df5p001},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			for _, index := range []int{0, 1, 201} {
				counts := make(map[string]int)
				for i := range seeds {
					p := mustPlan(t, testSeed(fmt.Sprintf("chi2 %d", i)), c.s)
					counts[p.Slot("lean=left", index).Arm]++
				}
				if stat := chiSquare(counts, c.s, seeds); stat > c.critical {
					t.Errorf("slot %d: chi-square %.3f > critical %.3f; counts %v", index, stat, c.critical, counts)
				}
			}
		})
	}
}

// fakeSource returns chosen values in order and counts how many were read.
type fakeSource struct {
	vals []uint64
	read int
}

func (f *fakeSource) Uint64() uint64 {
	v := f.vals[f.read]
	f.read++
	return v
}

// TestDrawBoundary checks the rejection rule at its edge. The reference for
// the rejected range is math/big: 2^64 mod n computed exactly, so the top
// (2^64 mod n) values of a uint64 are rejected and the next value is used.
func TestDrawBoundary(t *testing.T) {
	two64 := new(big.Int).Lsh(big.NewInt(1), 64)
	for _, n := range []int{1, 2, 3, 5, 6, 7, 8, 12, 1000, 1<<31 - 1, math.MaxInt64} {
		rem := new(big.Int).Mod(two64, big.NewInt(int64(n))).Uint64()
		lastAccepted := new(big.Int).Sub(two64, big.NewInt(int64(rem)+1)) // 2^64 - rem - 1
		wantLast := new(big.Int).Mod(lastAccepted, big.NewInt(int64(n))).Int64()

		t.Run(fmt.Sprintf("AcceptLast%d", n), func(t *testing.T) {
			f := &fakeSource{vals: []uint64{lastAccepted.Uint64()}}
			if got := Draw(f, n); int64(got) != wantLast || f.read != 1 {
				t.Errorf("got %d after %d reads, want %d after 1", got, f.read, wantLast)
			}
		})
		if rem == 0 {
			continue // nothing to reject when n divides 2^64
		}
		t.Run(fmt.Sprintf("RejectTop%d", n), func(t *testing.T) {
			// Both ends of the rejected range, then an accepted 2n+1.
			firstRejected := lastAccepted.Uint64() + 1
			f := &fakeSource{vals: []uint64{firstRejected, math.MaxUint64, uint64(2*n + 1)}}
			if n > math.MaxInt64/4 {
				f.vals[2] = 5
			}
			want := int(f.vals[2] % uint64(n))
			if got := Draw(f, n); got != want || f.read != 3 {
				t.Errorf("got %d after %d reads, want %d after 3", got, f.read, want)
			}
		})
	}
}

// TestDrawShape checks every value of [0,n) appears with its expected
// frequency (chi-square against the e-Handbook critical values above).
func TestDrawShape(t *testing.T) {
	src := rand.NewChaCha8([32]byte(testSeed("draw shape")))
	for _, c := range []struct {
		n        int
		critical float64
	}{{3, chi2df2p001}, {6, chi2df5p001}} {
		const draws = 60000
		counts := make([]int, c.n)
		for range draws {
			counts[Draw(src, c.n)]++
		}
		stat := 0.0
		e := float64(draws) / float64(c.n)
		for v, k := range counts {
			if k == 0 {
				t.Errorf("n=%d: value %d never drawn", c.n, v)
			}
			stat += (float64(k) - e) * (float64(k) - e) / e
		}
		if stat > c.critical {
			t.Errorf("n=%d: chi-square %.3f > %.3f; counts %v", c.n, stat, c.critical, counts)
		}
	}
}

func TestValidate(t *testing.T) {
	cases := []struct {
		name string
		s    Scheme
		want string // substring of the error; empty for a valid scheme
	}{
		{"OK", schemeThree, ""},
		{"OKSix", schemeSix, ""},
		{"ErrNoArms", Scheme{Blocks: []int{4}}, "no arms"},
		{"ErrEmptyName", Scheme{Arms: []Ratio{{"a", 1}, {"", 1}}, Blocks: []int{2}}, "arm 2 has an empty name"},
		{"ErrDuplicate", Scheme{Arms: []Ratio{{"a", 1}, {"a", 1}}, Blocks: []int{2}}, `arm "a" is declared twice`},
		{"ErrWeightZero", Scheme{Arms: []Ratio{{"a", 1}, {"b", 0}}, Blocks: []int{2}}, "weight must be at least 1"},
		{"ErrWeightNegative", Scheme{Arms: []Ratio{{"a", -1}}, Blocks: []int{2}}, "weight must be at least 1"},
		{"ErrNoBlocks", Scheme{Arms: []Ratio{{"a", 1}, {"b", 1}}}, "no block sizes"},
		{"ErrBlockNotMultiple", Scheme{Arms: []Ratio{{"a", 1}, {"b", 2}}, Blocks: []int{3, 4}}, "block size 4 is not a positive multiple"},
		{"ErrBlockZero", Scheme{Arms: []Ratio{{"a", 1}, {"b", 1}}, Blocks: []int{0}}, "block size 0 is not a positive multiple"},
		{"ErrBlockNegative", Scheme{Arms: []Ratio{{"a", 1}, {"b", 1}}, Blocks: []int{-2}}, "block size -2 is not a positive multiple"},
		{"ErrBlockTooLarge", Scheme{Arms: []Ratio{{"a", 1}}, Blocks: []int{MaxBlockSize + 1}}, "larger than the limit"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			err := c.s.Validate()
			switch {
			case c.want == "" && err != nil:
				t.Errorf("got %v, want nil", err)
			case c.want != "" && err == nil:
				t.Errorf("got nil, want error containing %q", c.want)
			case c.want != "" && !strings.Contains(err.Error(), c.want):
				t.Errorf("got %q, want it to contain %q", err, c.want)
			}
		})
	}
}

func TestNewPlanErrors(t *testing.T) {
	if _, err := NewPlan(make([]byte, MinSeedLen-1), schemeThree); err == nil || !strings.Contains(err.Error(), "seed has 15 bytes") {
		t.Errorf("short seed: got %v, want seed length error", err)
	}
	if _, err := NewPlan(testSeed("x"), Scheme{}); err == nil || !strings.Contains(err.Error(), "no arms") {
		t.Errorf("invalid scheme: got %v, want wrapped validation error", err)
	}
	if _, err := NewPlan(make([]byte, MinSeedLen), schemeThree); err != nil {
		t.Errorf("16-byte seed: got %v, want nil", err)
	}
}

// TestConcurrent checks that 64 goroutines taking slots at once see the same
// slots as serial use (run with -race).
func TestConcurrent(t *testing.T) {
	seed := testSeed("concurrent")
	strata := []string{"s0", "s1", "s2"}
	const n = 500
	want := make(map[string][]Slot)
	for _, s := range strata {
		want[s] = mustPlan(t, seed, schemeSix).Sequence(s, n)
	}
	p := mustPlan(t, seed, schemeSix)
	var wg sync.WaitGroup
	errs := make(chan string, 64)
	for g := range 64 {
		wg.Go(func() {
			for k := range n {
				i := (k*7 + g*13) % n
				s := strata[(g+k)%len(strata)]
				var got Slot
				if g%8 == 0 {
					got = p.Sequence(s, i+1)[i]
				} else {
					got = p.Slot(s, i)
				}
				if got != want[s][i] {
					errs <- fmt.Sprintf("goroutine %d, %s slot %d: got %+v, want %+v", g, s, i, got, want[s][i])
					return
				}
			}
		})
	}
	wg.Wait()
	close(errs)
	for e := range errs {
		t.Error(e)
	}
}

// vectorFile is testdata/vector.json, written by testdata/regenerate.py, a
// separate implementation of the algorithm in Python's standard library.
type vectorFile struct {
	Algorithm string `json:"algorithm"`
	SeedHex   string `json:"seed_hex"`
	Cases     []struct {
		Stratum string `json:"stratum"`
		Arms    []struct {
			Arm    string `json:"arm"`
			Weight int    `json:"weight"`
		} `json:"arms"`
		Blocks      []int    `json:"blocks"`
		KeyHex      string   `json:"key_hex"`
		FirstUint64 []uint64 `json:"first_uint64s"`
		Slots       []struct {
			Index     int    `json:"index"`
			Arm       string `json:"arm"`
			Block     int    `json:"block"`
			BlockSize int    `json:"block_size"`
			Position  int    `json:"position"`
		} `json:"slots"`
	} `json:"cases"`
}

// TestVector compares the plan with the Python reimplementation's output.
func TestVector(t *testing.T) {
	data, err := os.ReadFile(filepath.Join("testdata", "vector.json"))
	if err != nil {
		t.Fatal(err)
	}
	var v vectorFile
	if err := json.Unmarshal(data, &v); err != nil {
		t.Fatalf("parse vector.json: %v", err)
	}
	if v.Algorithm+"\x00" != Domain {
		t.Fatalf("vector is for %q, want %q", v.Algorithm, strings.TrimSuffix(Domain, "\x00"))
	}
	seed, err := hex.DecodeString(v.SeedHex)
	if err != nil {
		t.Fatal(err)
	}
	if len(v.Cases) == 0 {
		t.Fatal("vector.json has no cases")
	}
	for _, c := range v.Cases {
		t.Run(c.Stratum, func(t *testing.T) {
			var s Scheme
			for _, a := range c.Arms {
				s.Arms = append(s.Arms, Ratio{a.Arm, a.Weight})
			}
			s.Blocks = c.Blocks
			k := StratumKey(seed, c.Stratum)
			if got := hex.EncodeToString(k[:]); got != c.KeyHex {
				t.Errorf("key: got %s, want %s", got, c.KeyHex)
			}
			src := rand.NewChaCha8(k)
			for i, want := range c.FirstUint64 {
				if got := src.Uint64(); got != want {
					t.Errorf("stream value %d: got %#x, want %#x", i, got, want)
				}
			}
			got := mustPlan(t, seed, s).Sequence(c.Stratum, len(c.Slots))
			for i, w := range c.Slots {
				want := Slot{Index: w.Index, Arm: w.Arm, Block: w.Block, BlockSize: w.BlockSize, Position: w.Position}
				if got[i] != want {
					t.Fatalf("slot %d: got %+v, want %+v", i, got[i], want)
				}
			}
		})
	}
}

func BenchmarkSlotNext(b *testing.B) {
	p := mustPlan(b, testSeed("bench"), schemeThree)
	strata := []string{"lean=left", "lean=centre", "lean=right"}
	next := make([]int, len(strata))
	i := 0
	for b.Loop() {
		k := i % len(strata)
		if next[k] == 10000 { // a stratum's full size; start a fresh plan
			b.StopTimer()
			p = mustPlan(b, testSeed("bench"), schemeThree)
			clear(next)
			b.StartTimer()
		}
		_ = p.Slot(strata[k], next[k])
		next[k]++
		i++
	}
}

func BenchmarkSequence1000(b *testing.B) {
	seed := testSeed("bench")
	for b.Loop() {
		p, err := NewPlan(seed, schemeThree)
		if err != nil {
			b.Fatal(err)
		}
		_ = p.Sequence("lean=left", 1000)
	}
}
