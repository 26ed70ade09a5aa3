"""Sizes and false-positive rates of every filter kind, in one place, each with its source and a number.

Kinds: Bloom filters (`tamis.bloom`) and binary fuse filters (`tamis.fuse`). The region plan prices
each region with `filter_bytes`, the bytes a region's filter really adds to the artifact: its
stored words, the alignment padding of its section, and its section-table and header entries.

The sizes are those built. The rates: a built Bloom filter's for random keys is counted exactly
over its probe pairs (`built_bloom_fpr`), a fuse filter's is 2^-r; the textbook Bloom formula
(`bloom_fpr`) prices budgets before anything is built. The false-positive rate a user is promised
is always the one measured on held-out non-members (see `tamis.verify`).

Sources. B. H. Bloom, "Space/time trade-offs in hash coding with allowable errors", CACM 13(7),
1970, and the standard analysis that follows it. T. M. Graf and D. Lemire, "Binary Fuse Filters:
Fast and Smaller Than Xor Filters", ACM JEA 27, 2022 (segment lengths and size factors below, as
recalled from memory of the paper; our construction then retries with new seeds and larger
arrays when peeling fails, so these only need to make success likely, not certain).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

LN2 = math.log(2.0)

# A Bloom filter sized optimally needs 1/ln 2 = 1.4427 times the information-theoretic lower bound
# of log2(1/f) bits per key: at f = 1% that is 9.585 bits per key against 6.644.
BLOOM_OVERHEAD = 1.0 / LN2

# Bytes a region's filter section adds besides its words: its section-table entry (name, dtype,
# shape, offset, length, checksum: about 70 msgpack bytes), the filter's header fields (about 60)
# and on average half of the 64-byte alignment its section starts at (see tamis.artifact).
# Measured on the demo artifact: 140 to 170 bytes a section; 160 is the round figure.
SECTION_BYTES = 160


def lower_bound_bits(n: int, fpr: float) -> float:
    """Information-theoretic minimum n log2(1/f) bits for any filter of n keys at rate f."""
    return 0.0 if fpr >= 1.0 else n * math.log2(1.0 / fpr)


# ---------------------------------------------------------------------------------------------------
# Bloom filters
# ---------------------------------------------------------------------------------------------------


def bloom_bits(n: int, fpr: float) -> int:
    """Bits m of an optimally sized Bloom filter for n keys at false-positive rate fpr.

    m = -n ln f / (ln 2)^2, rounded up (Bloom 1970, standard analysis). At n = 1,000,000 and f = 1%
    that is 9,585,059 bits (1.14 MiB). A rate of 1 or more needs no filter (every key answers yes).
    """
    if not 0.0 < fpr:
        raise ValueError(f"false-positive rate must be > 0, got {fpr}")
    return int(bloom_bits_of(np.array([n]), np.array([fpr]))[0])


def bloom_bits_of(n: np.ndarray, fpr: np.ndarray) -> np.ndarray:
    """`bloom_bits` elementwise (float64 results): at least 1 bit for n > 0, none for n = 0 or f >= 1."""
    n = np.asarray(n, dtype=np.float64)
    with np.errstate(divide="ignore"):
        bits = np.maximum(1.0, np.ceil(n * -np.log(fpr) / (LN2 * LN2)))
    return np.where((n > 0) & (np.asarray(fpr) < 1.0), bits, 0.0)


def bloom_bytes_per_nat(n):
    """The bytes n ln(1/f) / (8 (ln 2)^2) of an optimal Bloom filter grow by this for each nat of
    ln(1/f): n / (8 (ln 2)^2), 0.26 bytes a key (the region plan's continuous Bloom price)."""
    return n / (8 * LN2 * LN2)


def bloom_hashes(m: int, n: int) -> int:
    """Number of probes k = (m/n) ln 2, rounded to the nearest integer, at least 1.

    At 9.585 bits per key this gives k = 7 (6.64 before rounding).
    """
    if n == 0 or m == 0:
        return 0
    return max(1, round(m / n * LN2))


# A Bloom filter of few members is given enough bits that keys sharing a member's probe pair (x, y)
# (`built_bloom_fpr`: they always pass, n / m^2 of all keys) take at most this share of its budget.
SAME_PAIR_SHARE = 0.1


def bloom_shape(n: int, fpr: float) -> tuple[int, int]:
    """Bits and probes of the Bloom filter the filters stage builds for n keys at budget fpr.

    Probes k = `bloom_hashes` of the optimal size m = `bloom_bits`; bits the larger of m and
    sqrt(n / (SAME_PAIR_SHARE f)), so that the keys that share a member's probe pair, n / m^2 of
    them, stay within a tenth of the budget. Only few members need the second: 2 members at
    f = 0.01% get 448 bits instead of 39 (whose same-pair keys alone would be 0.13%, 13 times the
    budget); from 11 members at 1% the optimal size is the larger.
    """
    bits = bloom_bits(n, fpr)
    if bits == 0:
        return 0, 0
    hashes = bloom_hashes(bits, n)
    return max(bits, math.ceil(math.sqrt(n / (SAME_PAIR_SHARE * fpr)))), hashes


def bloom_fpr(m: int, n: int, k: int) -> float:
    """Expected false-positive rate (1 - e^{-k n / m})^k of a filter with m bits, n keys, k probes.

    At m/n = 10 bits per key and k = 7 this is 0.819%; at 9.585 bits and k = 7 it is 1.003%.
    An empty filter (n = 0) answers no to everything; a missing one (m = 0) answers yes.
    """
    if m == 0:
        return 1.0
    if n == 0:
        return 0.0
    return (1.0 - math.exp(-k * n / m)) ** k


# Up to this many bits, `built_bloom_fpr` counts every probe pair; above it, it takes the fill.
EXACT_BLOOM_BITS = 1 << 13


def probe_offsets(bits: int, probes: int, step: int) -> list[int]:
    """Offsets d_i of the probes of a key whose second hash is `step` (y = b mod m), from its first
    position x: enhanced double hashing (`tamis.bloom`) puts probe i at x + d_i mod m with d_0 = 0,
    d_i = d_{i-1} + y_{i-1}, y_0 = y, y_i = y_{i-1} + i, so no offset depends on x."""
    offsets, offset, y = [0], 0, step % bits
    for i in range(1, probes):
        offset = (offset + y) % bits
        y = (y + i) % bits
        offsets.append(offset)
    return offsets


def built_bloom_fpr(words, bits: int, probes: int) -> float:
    """The false-positive rate of a built Bloom filter (uint64 `words`, little-endian bit order as in
    `tamis.bloom`) for random keys: the share of the m^2 probe pairs (x, y) = (a mod m, b mod m)
    whose every probe finds a set bit, each pair equally likely (a and b are uniform 64-bit halves;
    the bias of mod m is below m / 2^64).

    Exact up to EXACT_BLOOM_BITS bits: since probe i sits at x + d_i(y) (`probe_offsets`), the keys
    with second hash y that pass are the set bits of the AND of the bit array rotated by each d_i,
    counted for every y (m rotations a probe, on Python integers). Above it, fill^k: the rate of k
    independent probes into these very bits, which the double-hashing coincidences (two probes on
    one bit, a share of about k^2 / 2m of the keys) move by less than 1% of the rate there.

    Where the textbook formula fails: 19 bits, 13 probes, 1 member. The formula gives 0.011%, but a
    key with the member's own pair (1 in 361) always passes: exactly 0.277% + the rest.
    """
    if bits <= 0:
        return 1.0
    array = int.from_bytes(words.astype("<u8", copy=False).tobytes(), "little") & ((1 << bits) - 1)
    if bits > EXACT_BLOOM_BITS:
        return (array.bit_count() / bits) ** probes
    mask = (1 << bits) - 1
    rotations = [array] + [((array >> d) | (array << (bits - d))) & mask for d in range(1, bits)]
    passing = 0
    for step in range(bits):
        hits = mask
        for offset in probe_offsets(bits, probes, step):
            hits &= rotations[offset]
            if not hits:
                break
        passing += hits.bit_count()
    return passing / (bits * bits)


def bloom_bytes(n: int, fpr: float) -> int:
    """Stored bytes of the Bloom filter `tamis.filters` builds (`bloom_shape`): its bits in whole 64-bit words.

    At n = 10,000 and f = 1%: 95,851 bits, 1,498 words, 11,984 bytes.
    """
    return 8 * -(-bloom_shape(n, fpr)[0] // 64)


# ---------------------------------------------------------------------------------------------------
# Binary fuse filters (Graf and Lemire, JEA 2022)
# ---------------------------------------------------------------------------------------------------

FUSE_ARITIES = (3, 4)
FUSE_MAX_WIDTH = 32  # fingerprints come from the low 32 bits of one 64-bit mix (tamis.fuse)
FUSE_MAX_SEGMENT_LENGTH = 1 << 16  # four 16-bit slot offsets fit in one 64-bit mix (tamis.fuse)


@dataclass(frozen=True)
class FuseLayout:
    """The shape of a binary fuse filter's array: `arity` segments per key, each of
    `segment_length` slots, `segment_count` possible start segments."""

    arity: int
    segment_length: int
    segment_count: int

    @property
    def slots(self) -> int:
        return (self.segment_count + self.arity - 1) * self.segment_length

    def word_count(self, width: int) -> int:
        """uint64 words holding every slot's `width` bits."""
        return -(-self.slots * width // 64)


def fuse_segment_length(n: int, arity: int) -> int:
    """Segment length L, a power of two growing with n (Graf and Lemire 2022, as recalled):

    3-wise: 2^floor(ln n / ln 3.33 + 2.25); 4-wise: 2^floor(ln n / ln 2.91 - 0.5); here at least 1 and
    at most 2^16. At n = 100,000: 3-wise 2^11 = 2,048, 4-wise 2^10 = 1,024.
    """
    n = max(n, 2)
    if arity == 3:
        exponent = math.floor(math.log(n) / math.log(3.33) + 2.25)
    else:
        exponent = math.floor(math.log(n) / math.log(2.91) - 0.5)
    return 1 << min(max(exponent, 0), 16)


def fuse_size_factor(n: int, arity: int) -> float:
    """Slots per key the array is sized for (Graf and Lemire 2022, as recalled):

    3-wise: max(1.125, 0.875 + 0.25 ln(10^6) / ln n); 4-wise: max(1.075, 0.77 + 0.305 ln(600,000) / ln n).
    It grows for small sets: at n = 10,000, 1.250 (3-wise) and 1.211 (4-wise); at n = 1,000,000, 1.125
    and 1.075. These are the published figures for their layout; tests/test_fuse.py measures how
    often ours peels at them.
    """
    n = max(n, 2)
    if arity == 3:
        return max(1.125, 0.875 + 0.25 * math.log(1e6) / math.log(n))
    return max(1.075, 0.77 + 0.305 * math.log(6e5) / math.log(n))


def fuse_layout(n: int, arity: int, growth: float = 1.0) -> FuseLayout:
    """The array for n keys: capacity n x size factor x growth slots, in whole segments.

    start segments = max(1, ceil(capacity / L) - (arity - 1)), so the slots are
    (start segments + arity - 1) L, at least the capacity. At n = 100,000 3-wise: L = 2,048,
    factor 1.175, capacity 117,500, 56 start segments, 118,784 slots (1.188 per key).
    """
    if arity not in FUSE_ARITIES:
        raise ValueError(f"binary fuse filters here are 3-wise or 4-wise, got arity {arity}")
    length = fuse_segment_length(n, arity)
    capacity = round(max(n, 1) * fuse_size_factor(n, arity) * growth)
    starts = max(1, -(-capacity // length) - (arity - 1))
    return FuseLayout(arity, length, starts)


def fuse_fpr(width: int) -> float:
    """False-positive rate 2^-r of r-bit fingerprints: a non-member's fingerprint is independent of
    the XOR of its slots (Graf and Lemire 2020, 2022). r = 7: 0.78%; r = 8: 0.39%."""
    return 2.0 ** -width


def fuse_bytes(n: int, arity: int, width: int) -> int:
    """Stored bytes of a binary fuse filter of n keys with width-bit fingerprints (whole words).

    At n = 100,000, 4-wise, r = 7: L = 1,024, 112,640 slots, 788,480 bits, 98,560 bytes: 7.88 bits a
    key against the bound's 7 at f = 2^-7 (1.126 x); the same at 3-wise: 118,784 slots, 103,936 bytes.
    """
    return 8 * fuse_layout(n, arity).word_count(width)


def filter_bytes(kind: str, n: int, *, fpr: float | None = None, arity: int = 0, width: int = 0) -> int:
    """Bytes a region's filter adds to the artifact (words plus SECTION_BYTES): "bloom" at fpr,
    "fuse" with arity and width; 0 for "yes" and "no", which store nothing."""
    if kind in ("yes", "no"):
        return 0
    if kind == "bloom":
        return bloom_bytes(n, fpr) + SECTION_BYTES
    if kind == "fuse":
        return fuse_bytes(n, arity, width) + SECTION_BYTES
    raise ValueError(f"unknown filter kind {kind!r}")
