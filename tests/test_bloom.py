"""The Bloom filter structure: probing, bit order, no false negatives, and FPR against the formula."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xxhash

from tamis.bloom import BloomFilter, hash_keys, probe_positions, word_count
from tamis.sizing import bloom_fpr, bloom_hashes

# Binomial tolerance used for every measured rate: 4 standard deviations (common practice; the chance
# that a correct filter falls outside is about 6e-5 per check).
SIGMA_TOLERANCE = 4.0


def random_keys(count: int, seed: int, prefix: bytes) -> list[bytes]:
    """Distinct random keys: a prefix that tells the sets apart, then 12 random bytes."""
    raw = np.random.default_rng(seed).bytes(12 * count)
    return [prefix + raw[12 * i : 12 * i + 12] for i in range(count)]


def reference_positions(key: bytes, seed: int, bits: int, probes: int) -> list[int]:
    """Enhanced double hashing written out with Python integers, as in Dillinger and Manolios,
    "Bloom filters in probabilistic verification", FMCAD 2004, as recalled from memory
    (a = low, b = high half of xxh3_128)."""
    value = xxhash.xxh3_128_intdigest(key, seed)
    x, y = (value & (2**64 - 1)) % bits, (value >> 64) % bits
    positions = [x]
    for i in range(1, probes):
        x = (x + y) % bits
        y = (y + i) % bits
        positions.append(x)
    return positions


def test_hash_halves_match_the_128_bit_value():
    keys = [b"", b"a", b"emberfall", bytes(range(256))]
    hashes = hash_keys(keys, seed=99)
    for i, key in enumerate(keys):
        value = xxhash.xxh3_128_intdigest(key, 99)
        assert int(hashes.low[i]) == value & (2**64 - 1)
        assert int(hashes.high[i]) == value >> 64
    assert hashes.low.dtype == np.uint64 and hashes.high.dtype == np.uint64


def test_positions_follow_enhanced_double_hashing():
    keys = random_keys(200, seed=1, prefix=b"p")
    for bits, probes in [(1, 3), (7, 4), (1000, 7), (2**40 + 17, 11), (2**63, 5)]:
        positions = probe_positions(hash_keys(keys, 5), bits, probes)
        expected = np.array([reference_positions(k, 5, bits, probes) for k in keys], dtype=np.uint64)
        assert np.array_equal(positions.T, expected), (bits, probes)


def test_bit_order_golden():
    # Pinned by hand: positions 94, 51, 9 (emberfall) and 49, 7, 66 (ashgate) with 100 bits, 3 probes,
    # seed 2026. Bit p is bit p % 64 of word p // 64, least significant first; words little-endian.
    bloom = BloomFilter.empty(bits=100, hashes=3, seed=2026)
    bloom.insert([b"emberfall", b"ashgate"])
    for key in (b"emberfall", b"ashgate"):
        assert sorted(reference_positions(key, 2026, 100, 3)) == sorted(
            int(p) for p in probe_positions(hash_keys([key], 2026), 100, 3)[:, 0]
        )
    assert [int(w) for w in bloom.words] == [(1 << 51) | (1 << 49) | (1 << 9) | (1 << 7), (1 << 30) | (1 << 2)]
    assert bloom.words.astype("<u8").tobytes().hex() == "8002000000000a000400004000000000"


def test_no_false_negatives_and_single_key_path_agrees():
    members = random_keys(5000, seed=2, prefix=b"m")
    others = random_keys(5000, seed=3, prefix=b"o")
    bloom = BloomFilter.empty(bits=5000 * 6, hashes=4, seed=11)
    bloom.insert(members)
    assert bloom.query(members).all()
    assert all(bloom.contains(k) for k in members)
    batch = bloom.query(others)
    assert [bloom.contains(k) for k in others] == batch.tolist()


def test_padding_bits_stay_clear():
    bloom = BloomFilter.empty(bits=70, hashes=5, seed=0)
    bloom.insert(random_keys(500, seed=4, prefix=b"k"))
    assert int(bloom.words[1]) >> (70 - 64) == 0
    assert word_count(70) == 2 and word_count(64) == 1 and word_count(1) == 1


@pytest.mark.parametrize("bits_per_key", [2, 5, 8, 12])
def test_measured_fpr_matches_bloom_formula(bits_per_key):
    # Expected rate (1 - e^{-kn/m})^k: B. H. Bloom, "Space/time trade-offs in hash coding with
    # allowable errors", CACM 13(7), 1970, and the standard analysis. At m/n >= 2 and m of 10^5 bits
    # the formula's own error is far inside the binomial tolerance.
    members = random_keys(20_000, seed=10 + bits_per_key, prefix=b"m")
    others = random_keys(200_000, seed=20 + bits_per_key, prefix=b"o")
    bits = bits_per_key * len(members)
    probes = bloom_hashes(bits, len(members))
    bloom = BloomFilter.empty(bits=bits, hashes=probes, seed=3)
    bloom.insert(members)
    assert bloom.query(members).all()
    expected = bloom_fpr(bits, len(members), probes)
    false_positives = int(bloom.query(others).sum())
    sigma = math.sqrt(len(others) * expected * (1 - expected))
    assert abs(false_positives - len(others) * expected) <= SIGMA_TOLERANCE * sigma, (
        false_positives / len(others),
        expected,
    )


def test_empty_batches():
    bloom = BloomFilter.empty(bits=64, hashes=2, seed=0)
    bloom.insert([])
    assert bloom.query([]).shape == (0,)
    assert not bloom.words.any()
    assert not bloom.contains(b"anything")


def test_read_only_words_can_be_queried():
    bloom = BloomFilter.empty(bits=1000, hashes=3, seed=8)
    bloom.insert([b"x", b"y"])
    frozen = bloom.words.copy()
    frozen.flags.writeable = False
    view = BloomFilter.from_words(frozen, bits=1000, hashes=3, seed=8)
    assert view.query([b"x", b"y"]).all() and view.contains(b"x")
    with pytest.raises(ValueError, match="read-only"):
        view.insert([b"z"])
    assert np.array_equal(frozen, bloom.words)


@pytest.mark.parametrize(
    "words, bits, hashes, seed, message",
    [
        (np.zeros(2, np.uint64), 0, 1, 0, r"between 1 and 2\^63 bits"),
        (np.zeros(2, np.uint64), 100, 0, 0, "between 1 and 64 probes"),
        (np.zeros(2, np.uint64), 100, 65, 0, "between 1 and 64 probes"),
        (np.zeros(2, np.uint64), 100, 1, -1, "seed"),
        (np.zeros(2, np.uint64), 100, 1, 2**64, "seed"),
        (np.zeros(3, np.uint64), 100, 1, 0, "needs 2 uint64 words"),
        (np.zeros(2, np.int64), 100, 1, 0, "needs 2 uint64 words"),
    ],
)
def test_from_words_rejects_bad_parameters(words, bits, hashes, seed, message):
    with pytest.raises(ValueError, match=message):
        BloomFilter.from_words(words, bits=bits, hashes=hashes, seed=seed)
