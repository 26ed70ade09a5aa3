"""Filters stage: modes per region, sizes from the Bloom formulas, exactly the region's members."""

from __future__ import annotations

import math

import numpy as np
import pytest

from tamis.bloom import BloomFilter
from tamis.sizing import bloom_bits, bloom_fpr, bloom_hashes
from tamis.budgets import FilterChoice
from tamis.filters import build_filters, chunk_words, empty_filters, merge_words
from tamis.sizing import bloom_shape

SEED = 404
# Binomial tolerance for measured rates: 4 standard deviations (common practice).
SIGMA_TOLERANCE = 4.0


def random_keys(count: int, seed: int, prefix: bytes) -> list[bytes]:
    raw = np.random.default_rng(seed).bytes(10 * count)
    return [prefix + raw[10 * i : 10 * i + 10] for i in range(count)]


def test_modes_sizes_and_membership():
    keys = random_keys(9000, seed=1, prefix=b"m")
    # Region 0: no members; region 1: budget 1; regions 2 and 3: real filters at two budgets.
    regions = np.repeat([1, 2, 3], 3000).astype(np.int64)
    fprs = np.array([0.0, 1.0, 0.05, 0.002])
    built = build_filters(keys, regions, fprs, SEED)

    assert [f.mode for f in built] == ["no", "yes", "bloom", "bloom"]
    assert [f.members for f in built] == [0, 3000, 3000, 3000]
    assert [f.fpr_budget for f in built] == fprs.tolist()
    assert built[0].bits == built[1].bits == 0 and built[0].words.size == built[1].words.size == 0
    for region in (2, 3):
        f = built[region]
        assert f.bits == bloom_bits(3000, fprs[region])
        assert f.hashes == bloom_hashes(f.bits, 3000)
        mine = [k for k, r in zip(keys, regions) if r == region]
        # Exactly this region's members: the same bits as a filter built from them alone.
        alone = BloomFilter.empty(f.bits, f.hashes, SEED)
        alone.insert(mine)
        assert np.array_equal(f.words, alone.words)
        assert f.bloom(SEED).query(mine).all()


@pytest.mark.parametrize("budget", [0.1, 0.01])
def test_region_fpr_matches_budget(budget):
    # A region sized by bloom_bits/bloom_hashes should measure close to the formula
    # (B. H. Bloom, CACM 13(7), 1970; standard analysis), which is itself close to the budget.
    keys = random_keys(10_000, seed=2, prefix=b"m")
    (region,) = build_filters(keys, np.zeros(len(keys), np.int64), np.array([budget]), SEED)
    others = random_keys(100_000, seed=3, prefix=b"o")
    expected = bloom_fpr(region.bits, region.members, region.hashes)
    assert abs(expected - budget) / budget < 0.05
    false_positives = int(region.bloom(SEED).query(others).sum())
    sigma = math.sqrt(len(others) * expected * (1 - expected))
    assert abs(false_positives - len(others) * expected) <= SIGMA_TOLERANCE * sigma


@pytest.mark.parametrize("members", [0, 1, 2])
def test_tiny_regions(members):
    keys = random_keys(members, seed=4, prefix=b"t")
    built = build_filters(keys, np.zeros(members, np.int64), np.array([0.01]), SEED)
    assert len(built) == 1
    if members == 0:
        assert built[0].mode == "no"
    else:
        # few members: more bits than the formula's, so that keys sharing a member's probe pair
        # (members / m^2 of all keys) take at most a tenth of the budget
        assert built[0].mode == "bloom" and built[0].bits == bloom_shape(members, 0.01)[0] > bloom_bits(members, 0.01)
        assert members / built[0].bits**2 <= 0.1 * 0.01
        assert built[0].bloom(SEED).query(keys).all()


def test_empty_region_wins_over_budget_one():
    # No member can be lost in a region with no members, so "no" is chosen even at budget 1.
    (region,) = build_filters([], np.zeros(0, np.int64), np.array([1.0]), SEED)
    assert region.mode == "no"


def test_yes_mode_has_no_bloom():
    (region,) = build_filters([b"a"], np.zeros(1, np.int64), np.array([1.0]), SEED)
    with pytest.raises(ValueError, match="mode 'yes'"):
        region.bloom(SEED)


@pytest.mark.parametrize(
    "keys, regions, fprs, message",
    [
        ([b"a"], [0], [0.0], r"regions \[0\] hold members but have a false-positive budget of 0"),
        ([b"a"], [1], [0.1], r"must lie in \[0, 1\)"),
        ([b"a"], [-1], [0.1], r"must lie in \[0, 1\)"),
        ([b"a", b"b"], [0], [0.1], "one region per member key"),
        ([b"a"], [0.0], [0.1], "must be integers"),
        ([b"a"], [0], [1.5], r"must lie in \[0, 1\]"),
        ([b"a"], [0], [float("nan")], r"must lie in \[0, 1\]"),
        ([b"a"], [0], [], "non-empty"),
    ],
)
def test_bad_inputs_are_refused(keys, regions, fprs, message):
    with pytest.raises(ValueError, match=message):
        build_filters(keys, np.array(regions), np.array(fprs, dtype=np.float64), SEED)


def test_chunked_insertion_equals_one_pass():
    """Bits set chunk by chunk and ORed together, in any order, equal the bits of one insertion:
    setting a bit is idempotent and commutative (common practice: Bloom filters of the same size and
    hashes merge by OR into the filter of the union). A fuse filter is solved once from its members'
    hashes, which it sorts first, so the cut and the order of the chunks do not matter either."""
    keys = random_keys(30_000, 9, b"m")
    regions = np.random.default_rng(3).integers(0, 5, len(keys))
    choices = [FilterChoice("bloom", 0.01), FilterChoice("yes", 1.0), FilterChoice("bloom", 0.2),
               FilterChoice("bloom", 0.05), FilterChoice("fuse", 2.0**-9, arity=4, width=9)]
    whole = build_filters(keys, regions, choices, SEED)
    filters = empty_filters(regions, choices, SEED)
    cuts = [0, 1, 7_000, 7_001, 22_000, len(keys)]
    parts = [chunk_words(filters, keys[a:b], regions[a:b], SEED) for a, b in zip(cuts, cuts[1:])]
    merged = merge_words(filters, reversed(parts), SEED)
    assert [f.mode for f in merged] == ["bloom", "yes", "bloom", "bloom", "fuse"]
    for one, other in zip(whole, merged):
        assert (one.mode, one.bits, one.hashes, one.members, one.seed) == (other.mode, other.bits, other.hashes, other.members, other.seed)
        assert np.array_equal(one.words, other.words)
    mine = [key for key, region in zip(keys, regions) if region == 4]
    assert merged[4].fuse(SEED).query(mine).all()
    assert not filters[0].words.any(), "merging must not write into the empty filters"
