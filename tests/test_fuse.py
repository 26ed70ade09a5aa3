"""Binary fuse filters: no false negatives, a rate of 2^-r, the published sizes, packing, seeds."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xxhash

from tamis.bloom import KeyHashes, hash_keys
from tamis.fuse import SIZE_GROWTH, build_fuse, distinct_hashes, key_slots, pack_slots, peel, read_slots
from tamis.sizing import fuse_bytes, fuse_layout, fuse_size_factor

# Binomial tolerance used for every measured rate: 4 standard deviations (common practice).
SIGMA_TOLERANCE = 4.0
HASH_SEED = 0x5EED


def random_hashes(count: int, seed: int) -> KeyHashes:
    rng = np.random.default_rng(seed)
    return KeyHashes(rng.integers(0, 2**64 - 1, count, dtype=np.uint64), rng.integers(0, 2**64 - 1, count, dtype=np.uint64))


def random_keys(count: int, seed: int, prefix: bytes) -> list[bytes]:
    raw = np.random.default_rng(seed).bytes(12 * count)
    return [prefix + raw[12 * i : 12 * i + 12] for i in range(count)]


@pytest.mark.parametrize("arity", [3, 4])
@pytest.mark.parametrize("width", [1, 5, 8, 13, 17, 31, 32])
def test_every_member_answers_yes_at_every_width(arity, width):
    members = random_hashes(3000, width)
    fuse = build_fuse(members, width, arity, HASH_SEED)
    assert fuse.query_hashes(members).all()


@pytest.mark.parametrize("count", [0, 1, 2, 3, 17])
def test_tiny_sets(count):
    keys = random_keys(count, 1, b"m")
    fuse = build_fuse(hash_keys(keys, HASH_SEED), 8, 3, HASH_SEED)
    assert fuse.query(keys).all()
    assert all(fuse.contains(key) for key in keys)


def test_duplicate_keys_are_inserted_once():
    keys = random_keys(500, 2, b"m")
    fuse = build_fuse(hash_keys(keys * 3, HASH_SEED), 10, 4, HASH_SEED)
    assert fuse.query(keys).all()
    # sized for the 500 distinct keys
    assert fuse.words.size == fuse_layout(500, 4).word_count(10)
    assert len(distinct_hashes(hash_keys(keys * 3, HASH_SEED))) == 500


@pytest.mark.parametrize("width", [1, 3, 6, 9])
def test_rate_is_two_to_the_minus_width(width):
    # Graf and Lemire, JEA 2022: a non-member matches with probability 2^-r.
    fuse = build_fuse(random_hashes(20_000, 3), width, 4, HASH_SEED)
    others = random_hashes(400_000, 4)
    rate, expected = fuse.query_hashes(others).mean(), 2.0**-width
    assert abs(rate - expected) <= SIGMA_TOLERANCE * math.sqrt(expected * (1 - expected) / 400_000)


@pytest.mark.parametrize("arity", [3, 4])
def test_one_key_and_a_batch_give_the_same_answers(arity):
    members, others = random_keys(2000, 5, b"m"), random_keys(20_000, 6, b"o")
    fuse = build_fuse(hash_keys(members, HASH_SEED), 7, arity, HASH_SEED)
    batch = fuse.query(members + others)
    assert batch.tolist() == [fuse.contains(key) for key in members + others]


def reference_value(words: np.ndarray, slot: int, width: int) -> int:
    """The slot's bits read one by one: bit p is bit p % 64 of word p // 64 (least significant first)."""
    return sum(((int(words[(slot * width + b) // 64]) >> ((slot * width + b) % 64)) & 1) << b for b in range(width))


@pytest.mark.parametrize("width", [1, 7, 24, 31, 32])
def test_packing_round_trip_against_bit_by_bit_reading(width):
    rng = np.random.default_rng(width)
    values = rng.integers(0, 2**width, 333, dtype=np.uint64)
    words = pack_slots(values, width)
    assert words.size == math.ceil(333 * width / 64)
    slots = np.arange(333)
    assert read_slots(words, slots, width).tolist() == values.tolist()
    assert [reference_value(words, s, width) for s in range(333)] == values.tolist()


def test_slots_fall_in_consecutive_segments():
    layout = fuse_layout(50_000, 3)
    slots, fingerprints = key_slots(random_hashes(10_000, 7), layout, 12, 0)
    segments = slots // layout.segment_length
    assert (np.diff(segments, axis=0) == 1).all() and segments[0].max() < layout.segment_count
    assert slots.max() < layout.slots and fingerprints.max() < 2**12


def test_builds_are_deterministic_and_keep_the_seed_that_worked():
    members = random_hashes(11_400, 8)  # a size where 3-wise often fails at seed 0 (see below)
    first, second = build_fuse(members, 8, 3, HASH_SEED, seed=40), build_fuse(members, 8, 3, HASH_SEED, seed=40)
    assert first.seed == second.seed >= 40 and np.array_equal(first.words, second.words)
    assert first.query_hashes(members).all()


def test_the_bad_window_of_3_wise_is_survived():
    # Between about 11,200 and 11,500 keys the 3-wise segment length doubles while the set is still
    # small, and peeling at the published size factor mostly fails (measured: 16 to 40 failures in
    # 40 seeds). The build retries seeds, then grows the array; every build here succeeds.
    for count in (11_200, 11_350, 11_500):
        members = random_hashes(count, count)
        layout = fuse_layout(count, 3)
        failures = sum(peel(key_slots(members, layout, 8, s)[0], layout.slots) is None for s in range(8))
        fuse = build_fuse(members, 8, 3, HASH_SEED)
        assert fuse is not None and fuse.query_hashes(members).all()
        assert failures < 8 or fuse.segment_count > layout.segment_count  # grown when all seeds failed
    assert SIZE_GROWTH[0] == 1.0


@pytest.mark.parametrize(("arity", "count", "published"), [(3, 1_000_000, 1.125), (4, 1_000_000, 1.075), (3, 10_000, 1.25)])
def test_size_factor_formula_against_published_figures(arity, count, published):
    # Graf and Lemire, JEA 2022 (as recalled from memory): about 1.125 slots a key at a million keys
    # 3-wise and 1.075 4-wise; at 10,000 keys 3-wise 0.875 + 0.25 log(10^6) / log(10^4) = 1.25.
    assert fuse_size_factor(count, arity) == pytest.approx(published, abs=1e-9)
    layout = fuse_layout(count, arity)
    assert published <= layout.slots / count <= published * 1.05 + layout.segment_length / count


def test_worked_numbers_of_the_sizing_docstrings():
    assert fuse_layout(100_000, 3).slots == 118_784
    assert fuse_bytes(100_000, 4, 7) == 98_560
    assert fuse_bytes(100_000, 3, 7) == 103_936


def test_hash_halves_come_from_xxh3_128():
    key = b"emberfall"
    value = xxhash.xxh3_128_intdigest(key, HASH_SEED)
    hashes = hash_keys([key], HASH_SEED)
    assert int(hashes.low[0]) == value & (2**64 - 1) and int(hashes.high[0]) == value >> 64
