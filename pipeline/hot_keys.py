"""Sparing heavy keys: for each region, the variant of its filter that answers the fewest heavy
lookups "maybe".

A heavy non-member that a backup filter answers "maybe" by the luck of hashing costs its whole
weight in the rate, and its lookups reach the database every time: a hot false positive. The build
knows every heavy key and the region it falls in, so for each region with a Bloom filter it tries
`variants` bit counts m, m + 1, ..., m + variants - 1 with the same probes. The bit count moves
every position (they are taken mod m), so each variant is a fresh draw of that luck for the
region's heavy keys; the variant with the fewest heavy false-positive lookups is kept (the
smallest on a tie). Nothing else changes: the bit count is already part of every region's entry
in the artifact, so the format and the loader are untouched, and a variant costs at most one
64-bit word more than the first. A region with a binary fuse filter draws its variants by the
filter's own stored seed instead (start seeds j x 2^32, `FUSE_SEED_STRIDE`, so that no variant's
construction retries into another's seeds): the same bytes, a fresh draw of every slot and
fingerprint. Light keys take no part in the choice, so the tail's sample stays unbiased.

The gain: a region whose heavy keys carry weight W is a false positive for about W f of it with
one variant; keeping the best of m independent draws leaves the least of m such sums, so the build
can aim nearer the target (`tamis.verify.best_of_quantile` counts the variants in the aim).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np

from tamis.bloom import BloomFilter, hash_keys
from tamis.filters import RegionFilter, solved_fuse

# A fuse region's variant j starts its construction at seed j x this: a failed seed retries the
# next one, and 2^32 tries lie far beyond any construction's (tamis.fuse.SEEDS_PER_SIZE x sizes).
FUSE_SEED_STRIDE = 1 << 32


@dataclass(frozen=True)
class Sparing:
    """The filters (bits still clear) with the chosen bit counts, and the heavy false-positive
    lookups of the first variants against those of the chosen ones."""

    filters: list[RegionFilter]
    variants: int
    first_lookups: int
    chosen_lookups: int

    def as_report(self) -> dict:
        return {"variants": self.variants, "heavy_false_positive_lookups_first": self.first_lookups,
                "heavy_false_positive_lookups_chosen": self.chosen_lookups}


def _picked(keys: Sequence[bytes], mask: np.ndarray) -> list[bytes]:
    return [keys[i] for i in np.flatnonzero(mask)]


def heavy_false_positive_lookups(region: RegionFilter, bits: int, members, heavy, counts: np.ndarray, hash_seed: int) -> int:
    """Heavy lookups answered maybe by a region's Bloom filter of `bits` bits holding its members
    (`members` and `heavy` are the KeyHashes of the region's keys)."""
    bloom = BloomFilter.empty(bits, region.hashes, hash_seed)
    bloom.insert_hashes(members)
    return int(counts[bloom.query_hashes(heavy)].sum())


def fuse_false_positive_lookups(region: RegionFilter, seed: int, members, heavy, counts: np.ndarray, hash_seed: int) -> int:
    """Heavy lookups answered maybe by a region's fuse filter built from start seed `seed`, as the
    filters stage builds it from that seed (a Bloom filter should every construction fail)."""
    built = solved_fuse(replace(region, seed=seed), members, hash_seed)
    return int(counts[built.query_hashes(heavy, hash_seed)].sum())


def spare_heavy_keys(
    filters: Sequence[RegionFilter],
    member_keys: Sequence[bytes],
    member_regions: np.ndarray,
    heavy_keys: Sequence[bytes],
    heavy_counts: np.ndarray,
    heavy_regions: np.ndarray,
    hash_seed: int,
    variants: int,
) -> Sparing:
    """Per region with a filter and heavy keys, the variant of `variants` that spares them most: a
    Bloom filter's bit count, a fuse filter's start seed."""
    chosen, first, best = [], 0, 0
    for index, region in enumerate(filters):
        in_region = heavy_regions == index
        if region.mode not in ("bloom", "fuse") or not in_region.any():
            chosen.append(region)
            continue
        members = hash_keys(_picked(member_keys, member_regions == index), hash_seed)
        heavy = hash_keys(_picked(heavy_keys, in_region), hash_seed)
        counts = heavy_counts[in_region]
        if region.mode == "fuse":
            costs = [fuse_false_positive_lookups(region, j * FUSE_SEED_STRIDE, members, heavy, counts, hash_seed)
                     for j in range(variants)]
        else:
            costs = [heavy_false_positive_lookups(region, region.bits + j, members, heavy, counts, hash_seed) for j in range(variants)]
        pick = int(np.argmin(costs))
        first += costs[0]
        best += costs[pick]
        if region.mode == "fuse":
            chosen.append(replace(region, seed=pick * FUSE_SEED_STRIDE))
        else:
            bits = region.bits + pick
            chosen.append(replace(region, bits=bits, words=BloomFilter.empty(bits, region.hashes, hash_seed).words))
    return Sparing(chosen, variants, first, best)
