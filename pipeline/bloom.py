"""Bloom filters: the bit-array structure (its sizing formulas are in `tamis.sizing`).

Sources: B. H. Bloom, "Space/time trade-offs in hash coding with allowable errors", CACM 13(7), 1970,
and the standard analysis that follows it; positions by enhanced double hashing from P. C. Dillinger
and P. Manolios, "Bloom filters in probabilistic verification", FMCAD 2004.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import xxhash

from tamis.format import MAX_BLOOM_BITS, MAX_BLOOM_HASHES, SEED_LIMIT, WORD_BITS


# ---------------------------------------------------------------------------------------------------
# The bit-array structure.
#
# Hashing: every key (bytes) is hashed once with xxh3_128 under the filter's 64-bit seed. The low 64
# bits of the 128-bit value are a, the high 64 bits are b.
#
# Positions (enhanced double hashing, Dillinger and Manolios, FMCAD 2004; the paper's loop as recalled
# from memory):
#     x = a mod m;  y = b mod m;  p_0 = x
#     for i = 1 .. k-1:  x = (x + y) mod m;  y = (y + i) mod m;  p_i = x
# All values stay below m, so with m <= 2^63 every sum fits in a uint64 and no step wraps.
#
# Bit order: bit p lives in word p // 64 at bit p % 64, counting from the least significant bit.
# The words are stored little-endian, so bit p is also bit p % 8 of byte p // 8 of the stored bytes.
# Bits from m up to the end of the last word are always zero.
# ---------------------------------------------------------------------------------------------------

_LOW64 = (1 << 64) - 1


@dataclass(frozen=True, eq=False)
class KeyHashes:
    """The two 64-bit halves (a = low, b = high) of xxh3_128 for a batch of keys, as uint64 arrays."""

    low: np.ndarray
    high: np.ndarray

    def __len__(self) -> int:
        return len(self.low)

    def select(self, mask: np.ndarray) -> KeyHashes:
        """The hashes of the keys where mask (bool, one per key) is true."""
        return KeyHashes(self.low[mask], self.high[mask])


def check_seed(seed: int) -> None:
    """Raise ValueError unless seed is a valid xxh3 seed (an integer in [0, 2^64))."""
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or not 0 <= seed < SEED_LIMIT:
        raise ValueError(f"hash seed must be an integer in [0, 2^64), got {seed}")


def _halves(digests: list[bytes]) -> KeyHashes:
    # xxh3_128 digests are big-endian (high half first): one joined buffer read as big-endian
    # uint64 pairs gives both halves without further Python work.
    pairs = np.frombuffer(b"".join(digests), dtype=">u8").reshape(-1, 2)
    return KeyHashes(low=pairs[:, 1].astype(np.uint64), high=pairs[:, 0].astype(np.uint64))


def hash_keys(keys: Sequence[bytes], seed: int) -> KeyHashes:
    """xxh3_128 of every key under seed, split into its low and high 64-bit halves (one call a key)."""
    check_seed(seed)
    digest, seed = xxhash.xxh3_128_digest, int(seed)
    return _halves([digest(key, seed) for key in keys])


def hash_slices(buffer: bytes, starts: np.ndarray, stops: np.ndarray, seed: int) -> KeyHashes:
    """`hash_keys` of the keys buffer[starts[i]:stops[i]] (keys packed in one buffer)."""
    check_seed(seed)
    digest, seed = xxhash.xxh3_128_digest, int(seed)
    return _halves([digest(buffer[a:b], seed) for a, b in zip(starts.tolist(), stops.tolist())])


def probe_positions(hashes: KeyHashes, bits: int, probes: int) -> np.ndarray:
    """Bit positions, uint64 of shape (probes, n), by enhanced double hashing modulo bits."""
    m = np.uint64(bits)
    x = hashes.low % m
    y = hashes.high % m
    positions = np.empty((probes, len(hashes)), dtype=np.uint64)
    positions[0] = x
    for i in range(1, probes):
        np.add(x, y, out=x)
        np.remainder(x, m, out=x)
        np.add(y, np.uint64(i), out=y)
        np.remainder(y, m, out=y)
        positions[i] = x
    return positions


def word_count(bits: int) -> int:
    """Number of 64-bit words that hold bits bits."""
    return (bits + WORD_BITS - 1) // WORD_BITS


def _bit_masks(positions: np.ndarray) -> np.ndarray:
    return np.left_shift(np.uint64(1), positions & np.uint64(WORD_BITS - 1))


@dataclass(frozen=True, eq=False)
class BloomFilter:
    """A Bloom filter of `bits` bits probed `hashes` times per key, its bits in uint64 `words`.

    `insert` sets bits in `words` in place; every other method only reads, so `words` may be a
    read-only view of a mapped file. Build one with `BloomFilter.empty`, wrap stored words with
    `BloomFilter.from_words`.
    """

    bits: int
    hashes: int
    seed: int
    words: np.ndarray

    hashed = True  # its answer needs the key's hash (tamis.query)

    @classmethod
    def empty(cls, bits: int, hashes: int, seed: int) -> BloomFilter:
        """A filter with every bit clear."""
        return cls.from_words(np.zeros(word_count(bits), dtype=np.uint64), bits, hashes, seed)

    @classmethod
    def from_words(cls, words: np.ndarray, bits: int, hashes: int, seed: int) -> BloomFilter:
        """Wrap existing words, checking that they fit the parameters."""
        if not 1 <= bits <= MAX_BLOOM_BITS:
            raise ValueError(f"a Bloom filter needs between 1 and 2^63 bits, got {bits}")
        if not 1 <= hashes <= MAX_BLOOM_HASHES:
            raise ValueError(f"a Bloom filter needs between 1 and {MAX_BLOOM_HASHES} probes per key, got {hashes}")
        check_seed(seed)
        if words.dtype != np.uint64 or words.shape != (word_count(bits),):
            raise ValueError(
                f"a Bloom filter of {bits} bits needs {word_count(bits)} uint64 words, "
                f"got dtype {words.dtype} and shape {words.shape}"
            )
        return cls(bits=int(bits), hashes=int(hashes), seed=int(seed), words=words)

    def insert(self, keys: Sequence[bytes]) -> None:
        """Add a batch of keys."""
        self.insert_hashes(hash_keys(keys, self.seed))

    def insert_hashes(self, key_hashes: KeyHashes) -> None:
        """Add keys already hashed with this filter's seed."""
        # ufunc.at does not honour the read-only flag, and a read-only view may be a mapped file.
        if not self.words.flags.writeable:
            raise ValueError("this Bloom filter's words are read-only (a loaded filter): cannot insert")
        positions = probe_positions(key_hashes, self.bits, self.hashes).ravel()
        np.bitwise_or.at(self.words, positions >> np.uint64(6), _bit_masks(positions))

    def query(self, keys: Sequence[bytes]) -> np.ndarray:
        """For each key, True when it may be in the filter, False when it surely is not."""
        return self.query_hashes(hash_keys(keys, self.seed))

    def query_hashes(self, key_hashes: KeyHashes) -> np.ndarray:
        """`query` for keys already hashed with this filter's seed."""
        positions = probe_positions(key_hashes, self.bits, self.hashes)
        words = self.words[positions >> np.uint64(6)]
        return np.logical_and.reduce((words & _bit_masks(positions)) != 0, axis=0)

    def contains(self, key: bytes) -> bool:
        """`query` for one key, in plain Python integers (same positions, no array set-up)."""
        return self.contains_hash(xxhash.xxh3_128_intdigest(key, self.seed))

    def contains_hash(self, value: int) -> bool:
        """`contains` of the key whose xxh3_128 under this filter's seed is `value` (a Python int)."""
        m = self.bits
        x = (value & _LOW64) % m
        y = (value >> 64) % m
        words = self.words
        for i in range(self.hashes):
            if i:
                x = (x + y) % m
                y = (y + i) % m
            if not (words.item(x >> 6) >> (x & 63)) & 1:
                return False
        return True

    @property
    def nbytes(self) -> int:
        """Bytes taken by the bit array."""
        return self.words.nbytes
