"""Sparing heavy keys: the chosen filter variants hold every member, answer the heavy keys no worse
than the first variants, and behave like independent draws of the luck of hashing."""

import math

import numpy as np

from tamis.bloom import BloomFilter
from tamis.budgets import FilterChoice
from tamis.filters import chunk_words, empty_filters, merge_words
from tamis.hot_keys import spare_heavy_keys

SEED = 0x5EED


def keys(prefix: str, count: int) -> list[bytes]:
    return [f"{prefix}-{i}".encode() for i in range(count)]


def test_the_chosen_variants_hold_every_member_and_spare_heavy_keys():
    members, heavy = keys("member", 3000), keys("heavy", 400)
    member_regions = np.arange(3000) % 3
    heavy_regions = np.arange(400) % 3
    counts = np.random.default_rng(1).integers(44, 5000, 400)
    choices = [FilterChoice("bloom", 0.2), FilterChoice("fuse", 2.0**-4, arity=4, width=4), FilterChoice("yes", 1.0)]
    empty = empty_filters(member_regions, choices, SEED)
    spared = spare_heavy_keys(empty, members, member_regions, heavy, counts, heavy_regions, SEED, variants=8)
    assert spared.chosen_lookups <= spared.first_lookups
    filled = merge_words(spared.filters, [chunk_words(spared.filters, members, member_regions, SEED)], SEED)
    found = 0
    for index, region in enumerate(filled):
        if region.mode not in ("bloom", "fuse"):
            continue
        if region.mode == "bloom":
            assert empty[index].bits <= region.bits < empty[index].bits + 8
        answer = region.bloom(SEED) if region.mode == "bloom" else region.fuse(SEED)
        assert answer.query([m for m, r in zip(members, member_regions) if r == index]).all()  # no false negative
        mask = heavy_regions == index
        found += int(counts[mask][answer.query([h for h, r in zip(heavy, heavy_regions) if r == index])].sum())
    # the filled filters answer the heavy keys exactly as the choice predicted
    assert found == spared.chosen_lookups


def test_one_variant_changes_nothing():
    members, heavy = keys("m", 500), keys("h", 50)
    empty = empty_filters(np.zeros(500, dtype=np.int64), np.array([0.1]), SEED)
    spared = spare_heavy_keys(empty, members, np.zeros(500, dtype=np.int64), heavy, np.full(50, 100),
                              np.zeros(50, dtype=np.int64), SEED, variants=1)
    assert spared.filters[0].bits == empty[0].bits and spared.chosen_lookups == spared.first_lookups


def test_variants_are_independent_draws_of_the_luck():
    # One heavy key per trial in a region at budget f: with the best of two variants it stays a
    # false positive only when both are, with chance about f^2 if the variants' answers are
    # independent (they hash the same key to positions mod m and mod m + 1). 600 trials at
    # f = 0.3: expect 0.09 x 600 = 54; a 4-sigma binomial band (common practice).
    trials, f = 600, 0.3
    members = keys("member", 200)
    regions = np.zeros(200, dtype=np.int64)
    empty = empty_filters(regions, np.array([f]), SEED)
    first = BloomFilter.empty(empty[0].bits, empty[0].hashes, SEED)
    first.insert(members)
    stays = 0
    singles = 0
    for trial in range(trials):
        heavy = [f"hot-{trial}".encode()]
        spared = spare_heavy_keys(empty, members, regions, heavy, np.array([1]), np.zeros(1, dtype=np.int64), SEED, 2)
        stays += spared.chosen_lookups
        singles += spared.first_lookups
    rate = first.query(keys("probe", 20_000)).mean()  # the first variant's real rate
    assert abs(singles - trials * rate) <= 4 * math.sqrt(trials * rate * (1 - rate))
    expected = trials * rate * rate
    assert abs(stays - expected) <= 4 * math.sqrt(expected * (1 - rate * rate)), (stays, expected)
