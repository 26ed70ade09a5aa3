"""Every filter kind's planned rate (`tamis.filters.region_rate`) against its rate measured on random keys.

Tolerance (named BINOMIAL_SIGMAS): a rate p measured on N independent random keys is a binomial
count over N, of standard deviation sqrt(p (1 - p) / N); every check allows BINOMIAL_SIGMAS of
them plus half a key (the count is a whole number). 5 sigmas leave each check a false alarm chance
of about 6e-7 (normal tail, common practice), so the 60-odd checks here fail by chance about once
in 30,000 runs.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tamis.bloom import BloomFilter, KeyHashes
from tamis.budgets import FilterChoice
from tamis.filters import build_filters, region_rate
from tamis.sizing import EXACT_BLOOM_BITS, bloom_fpr, built_bloom_fpr

BINOMIAL_SIGMAS = 5.0
HASH_SEED = 0x5EED
PROBES_PER_CHECK = 40_000


def random_hashes(count: int, seed: int) -> KeyHashes:
    """Random keys' xxh3_128 halves: uniform 64-bit values, as a good hash gives for distinct keys."""
    rng = np.random.default_rng(seed)
    return KeyHashes(rng.integers(0, 2**64, count, dtype=np.uint64), rng.integers(0, 2**64, count, dtype=np.uint64))


def within_binomial(measured: float, rate: float, keys: int) -> bool:
    return abs(measured - rate) <= BINOMIAL_SIGMAS * math.sqrt(rate * (1 - rate) / keys) + 0.5 / keys


def bloom_cases(count: int, seed: int):
    """(bits, probes, members) drawn across 8..4096 bits, 1..16 probes, 1..200 members, log-uniform in size."""
    rng = np.random.default_rng(seed)
    bits = np.exp(rng.uniform(math.log(8), math.log(4096), count)).astype(int)
    return list(zip(bits.tolist(), rng.integers(1, 17, count).tolist(), rng.integers(1, 201, count).tolist()))


# the cases the textbook formula gets worst (issue figures): 19 bits / 13 probes / 1 member, 64 / 6 / 4
@pytest.mark.parametrize("bits,probes,members", [(19, 13, 1), (64, 6, 4), (8, 1, 1), (4096, 16, 200), *bloom_cases(40, 19)])
def test_bloom_planned_rate_is_measured_rate(bits, probes, members):
    bloom = BloomFilter.empty(bits, probes, HASH_SEED)
    bloom.insert_hashes(random_hashes(members, bits * 1000 + probes))
    planned = built_bloom_fpr(bloom.words, bits, probes)
    measured = float(bloom.query_hashes(random_hashes(PROBES_PER_CHECK, 7 + bits)).mean())
    assert within_binomial(measured, planned, PROBES_PER_CHECK), (planned, measured)


def test_exact_bloom_rate_is_where_the_formula_fails():
    # 19 bits, 13 probes, 1 member: a key sharing the member's probe pair (1 in 19^2) always passes,
    # so the rate is at least 1/361 = 0.277%; the formula (1 - e^{-kn/m})^k says 0.011%.
    bloom = BloomFilter.empty(19, 13, HASH_SEED)
    bloom.insert_hashes(random_hashes(1, 3))
    assert built_bloom_fpr(bloom.words, 19, 13) >= 1 / 361 > 20 * bloom_fpr(19, 1, 13)


def test_large_bloom_rate_from_its_fill():
    bits, probes, members = 4 * EXACT_BLOOM_BITS + 5, 7, 3000
    bloom = BloomFilter.empty(bits, probes, HASH_SEED)
    bloom.insert_hashes(random_hashes(members, 11))
    keys = 400_000
    planned = built_bloom_fpr(bloom.words, bits, probes)
    measured = float(bloom.query_hashes(random_hashes(keys, 12)).mean())
    assert within_binomial(measured, planned, keys), (planned, measured)


@pytest.mark.parametrize("width", [1, 2, 4, 7, 10])
@pytest.mark.parametrize("members", [1, 5, 300])
def test_fuse_planned_rate_is_measured_rate(width, members):
    # Graf and Lemire, JEA 2022: a non-member's fingerprint matches with probability 2^-r.
    choice = FilterChoice("fuse", 2.0**-width, arity=3, width=width)
    hashes = random_hashes(members, width)
    keys = [int(v).to_bytes(8, "little") + int(w).to_bytes(8, "little") for v, w in zip(hashes.low, hashes.high)]
    (region,) = build_filters(keys, np.zeros(members, dtype=np.int64), [choice], HASH_SEED)
    assert region.mode == "fuse" and region_rate(region) == 2.0**-width
    measured = float(region.query_hashes(random_hashes(PROBES_PER_CHECK, 99), HASH_SEED).mean())
    assert within_binomial(measured, region_rate(region), PROBES_PER_CHECK)


@pytest.mark.parametrize("choice,members,rate", [(FilterChoice("yes", 1.0), 3, 1.0), (FilterChoice("bloom", 0.5), 0, 0.0)])
def test_constant_regions(choice, members, rate):
    (region,) = build_filters([b"k%d" % i for i in range(members)], np.zeros(members, dtype=np.int64), [choice], HASH_SEED)
    assert region_rate(region) == rate
    assert float(region.query_hashes(random_hashes(1000, 5), HASH_SEED).mean()) == rate
