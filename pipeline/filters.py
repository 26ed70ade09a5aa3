"""Filters stage: one backup Bloom filter per score region that needs one.

Region i receives the false-positive budget f_i chosen by the region plan and holds exactly the
members whose score falls in it. Three cases:

- no members in the region: mode "no", no bits (every key there answers no, which is never wrong);
- f_i = 1: mode "yes", no bits (every key there answers yes);
- otherwise: mode "bloom", a filter of bloom_bits(n_i, f_i) bits probed bloom_hashes(m_i, n_i) times.

All regions share one hash seed: a key falls in exactly one region, so their hashes never interact.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, Sequence

import numpy as np

from pipeline.bloom import BloomFilter, KeyHashes, bloom_bits, bloom_hashes, hash_keys

FilterMode = Literal["bloom", "yes", "no"]
FILTER_MODES = ("bloom", "yes", "no")


@dataclass(frozen=True, eq=False)
class RegionFilter:
    """The backup filter of one score region.

    `members` is the number of member keys inserted, `fpr_budget` the rate the plan allotted, `words`
    the bit array (uint64, empty for modes "yes" and "no").
    """

    mode: FilterMode
    bits: int
    hashes: int
    members: int
    fpr_budget: float
    words: np.ndarray

    def bloom(self, seed: int) -> BloomFilter:
        """This region's bits as a Bloom filter (mode "bloom" only)."""
        if self.mode != "bloom":
            raise ValueError(f"a region filter in mode {self.mode!r} has no Bloom filter")
        return BloomFilter.from_words(self.words, self.bits, self.hashes, seed)

    @property
    def nbytes(self) -> int:
        """Bytes taken by the bit array."""
        return self.words.nbytes


def _no_bits() -> np.ndarray:
    return np.zeros(0, dtype=np.uint64)


def build_region_filter(hashes: KeyHashes, fpr: float, hash_seed: int) -> RegionFilter:
    """The filter for one region holding the members with these hashes, at budget fpr."""
    members = len(hashes)
    if members == 0:
        return RegionFilter("no", 0, 0, 0, fpr, _no_bits())
    if fpr >= 1.0:
        return RegionFilter("yes", 0, 0, members, fpr, _no_bits())
    bits = bloom_bits(members, fpr)
    bloom = BloomFilter.empty(bits, bloom_hashes(bits, members), hash_seed)
    bloom.insert_hashes(hashes)
    return RegionFilter("bloom", bits, bloom.hashes, members, fpr, bloom.words)


def _check_inputs(member_keys: Sequence[bytes], regions: np.ndarray, fprs: np.ndarray) -> None:
    if fprs.ndim != 1 or len(fprs) == 0:
        raise ValueError(f"fprs must be a non-empty 1-d array of per-region rates, got shape {fprs.shape}")
    if np.isnan(fprs).any() or (fprs < 0).any() or (fprs > 1).any():
        raise ValueError(f"every per-region false-positive rate must lie in [0, 1], got {fprs.tolist()}")
    if regions.shape != (len(member_keys),):
        raise ValueError(
            f"member_regions must hold one region per member key: {len(member_keys)} keys, "
            f"regions of shape {regions.shape}"
        )
    if not np.issubdtype(regions.dtype, np.integer):
        raise ValueError(f"member_regions must be integers, got dtype {regions.dtype}")
    if len(regions) and (regions.min() < 0 or regions.max() >= len(fprs)):
        raise ValueError(
            f"member_regions must lie in [0, {len(fprs)}) for {len(fprs)} regions, "
            f"got values from {regions.min()} to {regions.max()}"
        )


def build_filters(
    member_keys: Sequence[bytes], member_regions: np.ndarray, fprs: np.ndarray, hash_seed: int
) -> list[RegionFilter]:
    """One RegionFilter per region (len(fprs) of them), each holding exactly its region's members.

    member_regions[j] is the region of member_keys[j] as the loader computes it. Each key is hashed
    once; a region with members and budget 0 is refused, since it could only answer no to them.
    """
    regions = np.asarray(member_regions)
    budgets = np.asarray(fprs, dtype=np.float64)
    _check_inputs(member_keys, regions, budgets)
    counts = np.bincount(regions.astype(np.int64), minlength=len(budgets))
    starved = np.flatnonzero((counts > 0) & (budgets == 0))
    if len(starved):
        raise ValueError(
            f"regions {starved.tolist()} hold members but have a false-positive budget of 0; "
            "a region with members needs a budget above 0 (fix the region plan)"
        )
    hashes = hash_keys(member_keys, hash_seed)
    return [
        build_region_filter(hashes.select(regions == i), float(budget), hash_seed)
        for i, budget in enumerate(budgets)
    ]
