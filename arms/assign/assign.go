// Package assign computes Trialogue's allocation sequences: stratified
// permuted-block randomization that is a pure function of a study's seed,
// its allocation scheme and a stratum key.
//
// The algorithm is fixed forever (version "v1"); an auditor can rebuild any
// stratum's sequence in another language from the seed alone:
//
//  1. Stratum key. k = HMAC-SHA256(key = seed, message = "trialogue/assign/v1"
//     + one zero byte + the stratum string's UTF-8 bytes). k is 32 bytes.
//  2. Stream. k seeds a ChaCha8Rand generator exactly as Go's
//     math/rand/v2.NewChaCha8(k) does; its output is specified by
//     https://c2sp.org/chacha8rand. Only its 64-bit outputs (Uint64) are
//     used, in order; no other method of math/rand/v2 is involved.
//  3. Bounded draw. draw(n), for n >= 1, returns an integer uniform in
//     [0, n): let r = 2^64 mod n; read x = Uint64(); if x > 2^64-1-r
//     (that is, x falls in the top r values, which would make x mod n
//     biased), discard x and read again; otherwise return x mod n. Every
//     draw reads at least one value, even draw(1), which returns 0.
//  4. Blocks. Let W be the sum of the arm weights. Block after block:
//     size = Blocks[draw(len(Blocks))]; the block's list holds each arm,
//     in declared order, repeated Weight*size/W times; then the list is
//     shuffled by Fisher–Yates: for i from size-1 down to 1, j = draw(i+1),
//     swap elements i and j.
//  5. Sequence. The stratum's sequence is the concatenation of its blocks;
//     slot index 0 is the first element of block 0.
//
// The file testdata/regenerate.py is such a reimplementation, written with
// Python's standard library only; it produces testdata/vector.json.
package assign

import (
	"crypto/hmac"
	"crypto/sha256"
	"errors"
	"fmt"
	"math/rand/v2"
	"sync"
)

// Domain is the prefix of the message that derives a stratum's key; it names
// the algorithm version so that a future change cannot collide with v1.
const Domain = "trialogue/assign/v1\x00"

// MinSeedLen is the shortest seed NewPlan accepts, in bytes.
const MinSeedLen = 16

// MaxBlockSize bounds a block size so that a typing slip in a study file
// cannot make one block allocate millions of slots.
const MaxBlockSize = 1 << 16

// Ratio is one arm's share of every block.
type Ratio struct {
	Arm    string
	Weight int // relative share; at least 1
}

// Scheme is a study's allocation: arms in declared order with ratios, and
// the block sizes to draw from.
type Scheme struct {
	Arms   []Ratio
	Blocks []int // each a positive multiple of the sum of the weights
}

// Validate reports the first problem of the scheme as an error with a plain
// sentence, or nil when the scheme can be used.
func (s Scheme) Validate() error {
	if len(s.Arms) == 0 {
		return errors.New("the scheme has no arms")
	}
	seen := make(map[string]bool, len(s.Arms))
	sum := 0
	for i, r := range s.Arms {
		if r.Arm == "" {
			return fmt.Errorf("arm %d has an empty name", i+1)
		}
		if seen[r.Arm] {
			return fmt.Errorf("arm %q is declared twice", r.Arm)
		}
		seen[r.Arm] = true
		if r.Weight < 1 {
			return fmt.Errorf("arm %q has weight %d, but a weight must be at least 1", r.Arm, r.Weight)
		}
		if r.Weight > MaxBlockSize {
			return fmt.Errorf("arm %q has weight %d, more than the largest block size %d", r.Arm, r.Weight, MaxBlockSize)
		}
		sum += r.Weight
	}
	if len(s.Blocks) == 0 {
		return errors.New("the scheme has no block sizes")
	}
	for _, b := range s.Blocks {
		if b < 1 || b%sum != 0 {
			return fmt.Errorf("block size %d is not a positive multiple of the sum of the weights, %d", b, sum)
		}
		if b > MaxBlockSize {
			return fmt.Errorf("block size %d is larger than the limit of %d", b, MaxBlockSize)
		}
	}
	return nil
}

// Slot is one position of a stratum's allocation sequence.
type Slot struct {
	Index     int    // 0-based position in the stratum's sequence
	Arm       string // the arm assigned at this position
	Block     int    // 0-based block number
	BlockSize int    // number of slots in that block
	Position  int    // 0-based position within the block
}

// Uint64Source is what Draw reads from; *rand.ChaCha8 satisfies it.
type Uint64Source interface {
	Uint64() uint64
}

// Draw returns an integer uniform in [0, n) read from src by rejection
// sampling, as step 3 of the package documentation specifies. It panics if
// n < 1.
func Draw(src Uint64Source, n int) int {
	if n < 1 {
		panic("assign: Draw with n < 1")
	}
	m := uint64(n)
	// r = 2^64 mod m, computed without 2^64: (2^64-1) mod m is one less.
	r := (^uint64(0)%m + 1) % m
	limit := ^uint64(0) - r // largest accepted value
	for {
		x := src.Uint64()
		if x <= limit {
			return int(x % m)
		}
	}
}

// slot is the compact cached form of a Slot; the arm is an index into the
// scheme's arms.
type slot struct {
	arm, block, size, pos int32
}

// stratum holds the generated prefix of one stratum's sequence and the
// stream positioned just after it.
type stratum struct {
	mu     sync.Mutex
	src    *rand.ChaCha8
	slots  []slot
	blocks int32 // blocks generated so far
	list   []int32
}

// Plan is the allocation of a whole study: safe for concurrent use, caching
// the sequences it has generated.
type Plan struct {
	seed   []byte
	arms   []Ratio
	blocks []int
	sum    int

	mu     sync.Mutex
	strata map[string]*stratum
}

// NewPlan returns the plan of a study with the given seed and scheme. It
// fails when the scheme is invalid or the seed is shorter than MinSeedLen.
func NewPlan(seed []byte, s Scheme) (*Plan, error) {
	if len(seed) < MinSeedLen {
		return nil, fmt.Errorf("new allocation plan: seed has %d bytes, need at least %d", len(seed), MinSeedLen)
	}
	if err := s.Validate(); err != nil {
		return nil, fmt.Errorf("new allocation plan: %w", err)
	}
	p := &Plan{
		seed:   append([]byte(nil), seed...),
		arms:   append([]Ratio(nil), s.Arms...),
		blocks: append([]int(nil), s.Blocks...),
		strata: make(map[string]*stratum),
	}
	for _, r := range p.arms {
		p.sum += r.Weight
	}
	return p, nil
}

// StratumKey returns the 32-byte key that seeds the stream of a stratum
// (step 1 of the package documentation).
func StratumKey(seed []byte, stratumKey string) [32]byte {
	mac := hmac.New(sha256.New, seed)
	mac.Write([]byte(Domain))
	mac.Write([]byte(stratumKey))
	var k [32]byte
	mac.Sum(k[:0])
	return k
}

// get returns the cached state of a stratum, creating it on first use.
func (p *Plan) get(key string) *stratum {
	p.mu.Lock()
	defer p.mu.Unlock()
	st := p.strata[key]
	if st == nil {
		st = &stratum{src: rand.NewChaCha8(StratumKey(p.seed, key))}
		p.strata[key] = st
	}
	return st
}

// extend generates whole blocks until the stratum holds at least n slots.
// The caller holds st.mu.
func (p *Plan) extend(st *stratum, n int) {
	for len(st.slots) < n {
		size := p.blocks[Draw(st.src, len(p.blocks))]
		list := st.list[:0]
		for a, r := range p.arms {
			for range r.Weight * size / p.sum {
				list = append(list, int32(a))
			}
		}
		for i := size - 1; i >= 1; i-- {
			j := Draw(st.src, i+1)
			list[i], list[j] = list[j], list[i]
		}
		for pos, a := range list {
			st.slots = append(st.slots, slot{arm: a, block: st.blocks, size: int32(size), pos: int32(pos)})
		}
		st.list = list
		st.blocks++
	}
}

func (p *Plan) slotAt(st *stratum, index int) Slot {
	c := st.slots[index]
	return Slot{
		Index:     index,
		Arm:       p.arms[c.arm].Arm,
		Block:     int(c.block),
		BlockSize: int(c.size),
		Position:  int(c.pos),
	}
}

// Slot returns the slot at index (0-based) of the stratum's sequence. It is
// a pure function of the seed, the scheme, the stratum and the index; it
// panics if index < 0.
func (p *Plan) Slot(stratumKey string, index int) Slot {
	if index < 0 {
		panic(fmt.Sprintf("assign: slot index %d is negative", index))
	}
	st := p.get(stratumKey)
	st.mu.Lock()
	defer st.mu.Unlock()
	p.extend(st, index+1)
	return p.slotAt(st, index)
}

// Sequence returns the first n slots of the stratum's sequence, or none when
// n <= 0.
func (p *Plan) Sequence(stratumKey string, n int) []Slot {
	if n <= 0 {
		return nil
	}
	st := p.get(stratumKey)
	st.mu.Lock()
	defer st.mu.Unlock()
	p.extend(st, n)
	out := make([]Slot, n)
	for i := range out {
		out[i] = p.slotAt(st, i)
	}
	return out
}
