"""Filters stage: one backup filter per score region that needs one.

Region i receives the filter the region plan chose (`tamis.budgets.FilterChoice`: a kind and a
budget f_i) and holds exactly the members whose score falls in it. Four cases:

- no members in the region: mode "no", no bits (every key there answers no, which is never wrong);
- f_i = 1: mode "yes", no bits (every key there answers yes);
- mode "bloom": a Bloom filter of the bits and probes `tamis.sizing.bloom_shape` gives n_i keys at f_i;
- mode "fuse": a binary fuse filter of r-bit fingerprints (f_i = 2^-r, `tamis.fuse`). Should its
  construction fail at every seed and size it tries, the region gets a Bloom filter at f_i instead.

All regions hash keys with one seed (xxh3_128): a key falls in exactly one region, so their hashes
never interact. A fuse filter remixes those hashes with its own seed, stored with it.

Members come in chunks: a Bloom filter's bits are the OR of each chunk's bits; a fuse filter is
solved once from the hashes of all its members, which each chunk hands over (16 bytes a member).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np

from tamis.bloom import BloomFilter, KeyHashes, hash_keys
from tamis.budgets import FilterChoice
from tamis.fuse import FuseFilter, build_fuse
from tamis.sizing import bloom_shape, built_bloom_fpr, fuse_fpr

FilterMode = Literal["bloom", "fuse", "yes", "no"]  # tamis.format.REGION_MODES


@dataclass(frozen=True, eq=False)
class RegionFilter:
    """The backup filter of one score region.

    `members` is the number of member keys inserted, `fpr_budget` the rate the plan allotted, `words`
    the stored uint64 array (empty for modes "yes" and "no"). `bits` is the stored bits of a Bloom
    filter (for a fuse filter: slots x width) and `hashes` the slots a key reads (Bloom probes, or
    the fuse filter's arity). A fuse filter also has its fingerprint `width`, its `seed` and the
    segment layout (`segment_length`, `segment_count`).
    """

    mode: FilterMode
    bits: int
    hashes: int
    members: int
    fpr_budget: float
    words: np.ndarray
    width: int = 0
    seed: int = 0
    segment_length: int = 0
    segment_count: int = 0

    def bloom(self, hash_seed: int) -> BloomFilter:
        """This region's bits as a Bloom filter (mode "bloom" only)."""
        if self.mode != "bloom":
            raise ValueError(f"a region filter in mode {self.mode!r} has no Bloom filter")
        return BloomFilter.from_words(self.words, self.bits, self.hashes, hash_seed)

    def fuse(self, hash_seed: int) -> FuseFilter:
        """This region's fingerprints as a binary fuse filter (mode "fuse" only)."""
        if self.mode != "fuse":
            raise ValueError(f"a region filter in mode {self.mode!r} has no binary fuse filter")
        return FuseFilter.from_words(
            self.words, self.hashes, self.width, self.seed, self.segment_length, self.segment_count, hash_seed
        )

    def query_hashes(self, key_hashes: KeyHashes, hash_seed: int) -> np.ndarray:
        """For keys of this region, hashed with the artifact's seed: may each be a member?"""
        if self.mode == "bloom":
            return self.bloom(hash_seed).query_hashes(key_hashes)
        if self.mode == "fuse":
            return self.fuse(hash_seed).query_hashes(key_hashes)
        return np.full(len(key_hashes), self.mode == "yes")

    @property
    def nbytes(self) -> int:
        """Bytes taken by the stored array."""
        return self.words.nbytes


def region_rate(region: RegionFilter) -> float:
    """The false-positive rate of a built region filter for random keys of its region: a Bloom
    filter's from its very bits (`tamis.sizing.built_bloom_fpr`), a fuse filter's 2^-r, 1 for "yes"
    and 0 for "no". The plan's rates are these, so the plan is the filter that gets built."""
    if region.mode == "bloom":
        return built_bloom_fpr(region.words, region.bits, region.hashes)
    if region.mode == "fuse":
        return fuse_fpr(region.width)
    return 1.0 if region.mode == "yes" else 0.0


def _no_bits() -> np.ndarray:
    return np.zeros(0, dtype=np.uint64)


def as_choices(plan_filters) -> list[FilterChoice]:
    """The plan's per-region filters: FilterChoices as they are, or an array of budgets read as
    Bloom filters at those rates (a Bloom-only plan, such as the one-threshold baseline's)."""
    if len(plan_filters) and isinstance(plan_filters[0], FilterChoice):
        return list(plan_filters)
    budgets = np.asarray(plan_filters, dtype=np.float64)
    _check_budgets(budgets)
    return [FilterChoice("bloom", float(f)) for f in budgets]


def empty_region_filter(members: int, choice: FilterChoice, hash_seed: int) -> RegionFilter:
    """The filter for one region of `members` members as the plan chose it, holding no key yet."""
    fpr = choice.fpr
    if members == 0:
        return RegionFilter("no", 0, 0, 0, fpr, _no_bits())
    if fpr >= 1.0 or choice.kind == "yes":
        return RegionFilter("yes", 0, 0, members, fpr, _no_bits())
    if choice.kind == "fuse":
        return RegionFilter("fuse", 0, choice.arity, members, fpr, _no_bits(), width=choice.width, seed=choice.seed)
    return _empty_bloom(members, fpr, hash_seed)


def _empty_bloom(members: int, fpr: float, hash_seed: int) -> RegionFilter:
    bits, hashes = bloom_shape(members, fpr)
    bloom = BloomFilter.empty(bits, hashes, hash_seed)
    return RegionFilter("bloom", bits, bloom.hashes, members, fpr, bloom.words)


def _check_budgets(fprs: np.ndarray) -> None:
    if fprs.ndim != 1 or len(fprs) == 0:
        raise ValueError(f"fprs must be a non-empty 1-d array of per-region rates, got shape {fprs.shape}")
    if np.isnan(fprs).any() or (fprs < 0).any() or (fprs > 1).any():
        raise ValueError(f"every per-region false-positive rate must lie in [0, 1], got {fprs.tolist()}")


def _check_regions(regions: np.ndarray, count: int, keys: int | None = None) -> None:
    """Integer regions in [0, count), one per key when the number of keys is given."""
    if regions.ndim != 1:
        raise ValueError(f"member_regions must be a 1-d array of region numbers, got shape {regions.shape}")
    if keys is not None and len(regions) != keys:
        raise ValueError(f"member_regions must hold one region per member key: {keys} keys, regions of shape {regions.shape}")
    if not np.issubdtype(regions.dtype, np.integer):
        raise ValueError(f"member_regions must be integers, got dtype {regions.dtype}")
    if len(regions) and (regions.min() < 0 or regions.max() >= count):
        raise ValueError(
            f"member_regions must lie in [0, {count}) for {count} regions, "
            f"got values from {regions.min()} to {regions.max()}"
        )


def empty_filters(member_regions: np.ndarray, plan_filters, hash_seed: int) -> list[RegionFilter]:
    """One RegionFilter per region (len(plan_filters) of them), sized for its members, holding none.

    member_regions[j] is the region of member j as the loader computes it; plan_filters is the
    plan's FilterChoices (or per-region budgets, read as Bloom filters: `as_choices`). A region
    with members and budget 0 is refused, since it could only answer no to them.
    """
    choices = as_choices(plan_filters)
    regions = np.asarray(member_regions)
    _check_budgets(np.array([choice.fpr for choice in choices]))
    _check_regions(regions, len(choices))
    counts = np.bincount(regions.astype(np.int64), minlength=len(choices))
    starved = [i for i, (count, choice) in enumerate(zip(counts, choices)) if count > 0 and choice.fpr == 0]
    if starved:
        raise ValueError(
            f"regions {starved} hold members but have a false-positive budget of 0; "
            "a region with members needs a budget above 0 (fix the region plan)"
        )
    return [empty_region_filter(int(count), choice, hash_seed) for count, choice in zip(counts, choices)]


def chunk_words(
    filters: Sequence[RegionFilter], member_keys: Sequence[bytes], member_regions: np.ndarray, hash_seed: int
) -> list[np.ndarray]:
    """What one chunk of members gives each region: for a Bloom filter, fresh words of its size
    with this chunk's members of the region inserted; for a fuse filter, their hashes (uint64 of
    shape (2, n): low and high halves); nothing for modes "yes" and "no".

    Bits are merged by OR and hashes by concatenation (`merge_words`), so the result does not
    depend on how the members were cut into chunks, nor on their order.
    """
    regions = np.asarray(member_regions)
    _check_regions(regions, len(filters), len(member_keys))
    hashes = hash_keys(member_keys, hash_seed)
    parts = []
    for index, region in enumerate(filters):
        if region.mode == "bloom":
            bloom = BloomFilter.empty(region.bits, region.hashes, hash_seed)
            bloom.insert_hashes(hashes.select(regions == index))
            parts.append(bloom.words)
        elif region.mode == "fuse":
            mine = hashes.select(regions == index)
            parts.append(np.stack((mine.low, mine.high)))
        else:
            parts.append(_no_bits())
    return parts


def merge_words(filters: Sequence[RegionFilter], chunks: Iterable[Sequence[np.ndarray]], hash_seed: int) -> list[RegionFilter]:
    """The filters with every chunk's part merged in (`chunk_words`): Bloom bits ORed, fuse filters
    solved from all their members' hashes."""
    chunks = list(chunks)
    merged = []
    for index, region in enumerate(filters):
        parts = [chunk[index] for chunk in chunks]
        if region.mode == "fuse":
            pairs = np.concatenate([np.zeros((2, 0), dtype=np.uint64), *parts], axis=1)
            merged.append(solved_fuse(region, KeyHashes(pairs[0], pairs[1]), hash_seed))
            continue
        words = region.words.copy()
        for part in parts:
            words |= part
        merged.append(replace(region, words=words))
    return merged


def solved_fuse(region: RegionFilter, key_hashes: KeyHashes, hash_seed: int) -> RegionFilter:
    """The fuse filter of these members; a Bloom filter at the same budget if construction fails."""
    fuse = build_fuse(key_hashes, region.width, region.hashes, hash_seed, region.seed)
    if fuse is None:
        bloom = _empty_bloom(region.members, region.fpr_budget, hash_seed)
        bloom.bloom(hash_seed).insert_hashes(key_hashes)
        return bloom
    layout = fuse.layout
    return replace(
        region, bits=layout.slots * fuse.width, words=fuse.words, seed=fuse.seed,
        segment_length=fuse.segment_length, segment_count=fuse.segment_count,
    )


def build_filters(member_keys: Sequence[bytes], member_regions: np.ndarray, plan_filters, hash_seed: int) -> list[RegionFilter]:
    """One RegionFilter per region, each holding exactly its region's members: `empty_filters` and
    the part of one chunk holding every member."""
    filters = empty_filters(member_regions, plan_filters, hash_seed)
    return merge_words(filters, [chunk_words(filters, member_keys, member_regions, hash_seed)], hash_seed)
