#!/usr/bin/env python3
"""Rebuild vector.json: Trialogue allocation sequences (assign v1) computed
from the seed with Python's standard library only, independently of the Go
code, following the algorithm in the doc comment of arms/assign/assign.go.

Run from this folder:  python3 regenerate.py > vector.json
"""
import hashlib
import hmac
import json
import struct

MASK32 = 0xFFFFFFFF
MASK64 = 0xFFFFFFFFFFFFFFFF


def _rotl(x, n):
    return ((x << n) | (x >> (32 - n))) & MASK32


def _qr(s, a, b, c, d):
    s[a] = (s[a] + s[b]) & MASK32; s[d] = _rotl(s[d] ^ s[a], 16)
    s[c] = (s[c] + s[d]) & MASK32; s[b] = _rotl(s[b] ^ s[c], 12)
    s[a] = (s[a] + s[b]) & MASK32; s[d] = _rotl(s[d] ^ s[a], 8)
    s[c] = (s[c] + s[d]) & MASK32; s[b] = _rotl(s[b] ^ s[c], 7)


def _block(key_words, counter):
    """One ChaCha8 block as ChaCha8Rand uses it (https://c2sp.org/chacha8rand):
    only the key words 4..11 get the input added back."""
    init = [0x61707865, 0x3320646E, 0x79622D32, 0x6B206574] + key_words + [counter, 0, 0, 0]
    s = list(init)
    for _ in range(4):
        _qr(s, 0, 4, 8, 12); _qr(s, 1, 5, 9, 13); _qr(s, 2, 6, 10, 14); _qr(s, 3, 7, 11, 15)
        _qr(s, 0, 5, 10, 15); _qr(s, 1, 6, 11, 12); _qr(s, 2, 7, 8, 13); _qr(s, 3, 4, 9, 14)
    for i in range(4, 12):
        s[i] = (s[i] + init[i]) & MASK32
    return s


class ChaCha8Rand:
    """The ChaCha8Rand generator; uint64() matches Go's rand.ChaCha8.Uint64."""

    def __init__(self, seed32):
        self.key = list(struct.unpack("<8I", seed32))
        self.counter = 0
        self.buf = []
        self._fill()

    def _fill(self):
        # Four blocks are interleaved word by word: word w of blocks 0..3,
        # then word w+1, ... read as little-endian 32-bit pairs into uint64s.
        blocks = [_block(self.key, self.counter + b) for b in range(4)]
        words = [blocks[b][w] for w in range(16) for b in range(4)]
        out = [words[2 * i] | (words[2 * i + 1] << 32) for i in range(32)]
        if self.counter == 12:
            # The last 4 uint64s of the 16th block group become the next key.
            nxt = out[28:]
            out = out[:28]
            self.key = list(struct.unpack("<8I", struct.pack("<4Q", *nxt)))
            self.counter = 0
        else:
            self.counter += 4
        self.buf = out
        self.pos = 0

    def uint64(self):
        if self.pos == len(self.buf):
            self._fill()
        x = self.buf[self.pos]
        self.pos += 1
        return x


def draw(src, n):
    r = (1 << 64) % n
    while True:
        x = src.uint64()
        if x <= MASK64 - r:
            return x % n


def stratum_key(seed, stratum):
    return hmac.new(seed, b"trialogue/assign/v1\x00" + stratum.encode("utf-8"), hashlib.sha256).digest()


def sequence(seed, arms, blocks, stratum, n):
    src = ChaCha8Rand(stratum_key(seed, stratum))
    total = sum(w for _, w in arms)
    slots = []
    block = 0
    while len(slots) < n:
        size = blocks[draw(src, len(blocks))]
        lst = [a for a, w in arms for _ in range(w * size // total)]
        for i in range(size - 1, 0, -1):
            j = draw(src, i + 1)
            lst[i], lst[j] = lst[j], lst[i]
        for pos, a in enumerate(lst):
            slots.append({"index": len(slots), "arm": a, "block": block, "block_size": size, "position": pos})
        block += 1
    return slots[:n]


def _self_check():
    # First outputs of Go's own golden test for ChaCha8Rand
    # (src/internal/chacha8rand/rand_test.go, seed "ABCDEFGHIJKLMNOPQRSTUVWXYZ123456").
    src = ChaCha8Rand(b"ABCDEFGHIJKLMNOPQRSTUVWXYZ123456")
    want = [0xB773B6063D4616A5, 0x1160AF22A66ABC3C, 0x8C2599D9418D287C, 0x7EE07E037EDC5CD6]
    got = [src.uint64() for _ in want]
    assert got == want, [hex(g) for g in got]


def main():
    _self_check()
    seed = bytes.fromhex("5472696c6f6775652074657374207665632d31")  # "Trialogue test vec-1"
    cases = [
        ("lean=left", [("a", 1), ("b", 1), ("c", 2)], [4, 8], 12),
        ("lean=right", [("notice", 1), ("letter", 1), ("tailored", 1), ("debate", 1), ("reflect", 1), ("chit-chat", 1)], [6, 12], 300),
    ]
    out = {"algorithm": "trialogue/assign/v1", "seed_hex": seed.hex(), "cases": []}
    for stratum, arms, blocks, n in cases:
        src = ChaCha8Rand(stratum_key(seed, stratum))
        out["cases"].append({
            "stratum": stratum,
            "arms": [{"arm": a, "weight": w} for a, w in arms],
            "blocks": blocks,
            "key_hex": stratum_key(seed, stratum).hex(),
            "first_uint64s": [src.uint64() for _ in range(3)],
            "slots": sequence(seed, arms, blocks, stratum, n),
        })
    print(json.dumps(out, indent=1))


if __name__ == "__main__":
    main()
