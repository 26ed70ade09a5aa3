"""Filters stage: one backup Bloom filter per score region that needs one.

Region i receives the false-positive budget f_i chosen by the region plan and holds exactly the
members whose score falls in it. Three cases:

- no members in the region: mode "no", no bits (every key there answers no, which is never wrong);
- f_i = 1: mode "yes", no bits (every key there answers yes);
- otherwise: mode "bloom", a filter of bloom_bits(n_i, f_i) bits probed bloom_hashes(m_i, n_i) times.

All regions share one hash seed: a key falls in exactly one region, so their hashes never interact.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

from tamis.bloom import BloomFilter, bloom_bits, bloom_hashes, hash_keys

FilterMode = Literal["bloom", "yes", "no"]  # tamis.format.REGION_MODES


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


def empty_region_filter(members: int, fpr: float, hash_seed: int) -> RegionFilter:
    """The filter for one region of `members` members at budget fpr, its bits all clear."""
    if members == 0:
        return RegionFilter("no", 0, 0, 0, fpr, _no_bits())
    if fpr >= 1.0:
        return RegionFilter("yes", 0, 0, members, fpr, _no_bits())
    bits = bloom_bits(members, fpr)
    bloom = BloomFilter.empty(bits, bloom_hashes(bits, members), hash_seed)
    return RegionFilter("bloom", bits, bloom.hashes, members, fpr, bloom.words)


def _check_inputs(regions: np.ndarray, fprs: np.ndarray, keys: int | None = None) -> None:
    """Budgets in [0, 1]; integer regions in range, one per key when the number of keys is given."""
    if fprs.ndim != 1 or len(fprs) == 0:
        raise ValueError(f"fprs must be a non-empty 1-d array of per-region rates, got shape {fprs.shape}")
    if np.isnan(fprs).any() or (fprs < 0).any() or (fprs > 1).any():
        raise ValueError(f"every per-region false-positive rate must lie in [0, 1], got {fprs.tolist()}")
    if regions.ndim != 1:
        raise ValueError(f"member_regions must be a 1-d array of region numbers, got shape {regions.shape}")
    if keys is not None and len(regions) != keys:
        raise ValueError(f"member_regions must hold one region per member key: {keys} keys, regions of shape {regions.shape}")
    if not np.issubdtype(regions.dtype, np.integer):
        raise ValueError(f"member_regions must be integers, got dtype {regions.dtype}")
    if len(regions) and (regions.min() < 0 or regions.max() >= len(fprs)):
        raise ValueError(
            f"member_regions must lie in [0, {len(fprs)}) for {len(fprs)} regions, "
            f"got values from {regions.min()} to {regions.max()}"
        )


def empty_filters(member_regions: np.ndarray, fprs: np.ndarray, hash_seed: int) -> list[RegionFilter]:
    """One RegionFilter per region (len(fprs) of them), sized for its members, its bits all clear.

    member_regions[j] is the region of member j as the loader computes it. A region with members
    and budget 0 is refused, since it could only answer no to them.
    """
    regions = np.asarray(member_regions)
    budgets = np.asarray(fprs, dtype=np.float64)
    _check_inputs(regions, budgets)
    counts = np.bincount(regions.astype(np.int64), minlength=len(budgets))
    starved = np.flatnonzero((counts > 0) & (budgets == 0))
    if len(starved):
        raise ValueError(
            f"regions {starved.tolist()} hold members but have a false-positive budget of 0; "
            "a region with members needs a budget above 0 (fix the region plan)"
        )
    return [empty_region_filter(int(count), float(budget), hash_seed) for count, budget in zip(counts, budgets)]


def chunk_words(
    filters: Sequence[RegionFilter], member_keys: Sequence[bytes], member_regions: np.ndarray, hash_seed: int
) -> list[np.ndarray]:
    """The bits of one chunk of members: per region, fresh words of that region's size with this
    chunk's members of the region inserted (empty words for modes "yes" and "no").

    Setting a bit is an OR, so the bits of all members are the OR of the chunks' words, in any order
    and however the members were cut into chunks (`merge_words`).
    """
    regions = np.asarray(member_regions)
    _check_inputs(regions, np.array([f.fpr_budget for f in filters]), len(member_keys))
    hashes = hash_keys(member_keys, hash_seed)
    words = []
    for index, region in enumerate(filters):
        if region.mode != "bloom":
            words.append(_no_bits())
            continue
        bloom = BloomFilter.empty(region.bits, region.hashes, hash_seed)
        bloom.insert_hashes(hashes.select(regions == index))
        words.append(bloom.words)
    return words


def merge_words(filters: Sequence[RegionFilter], chunks: Iterable[Sequence[np.ndarray]]) -> list[RegionFilter]:
    """The filters with every chunk's words ORed into their bits (`chunk_words`)."""
    merged = [region.words.copy() for region in filters]
    for words in chunks:
        for into, part in zip(merged, words, strict=True):
            into |= part
    return [replace(region, words=bits) for region, bits in zip(filters, merged)]


def build_filters(
    member_keys: Sequence[bytes], member_regions: np.ndarray, fprs: np.ndarray, hash_seed: int
) -> list[RegionFilter]:
    """One RegionFilter per region (len(fprs) of them), each holding exactly its region's members:
    `empty_filters` and the words of one chunk holding every member."""
    filters = empty_filters(member_regions, fprs, hash_seed)
    return merge_words(filters, [chunk_words(filters, member_keys, member_regions, hash_seed)])
