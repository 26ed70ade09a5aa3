"""Binary fuse filters: static fingerprint filters built by peeling, with r-bit packed fingerprints.

Method: T. M. Graf and D. Lemire, "Binary Fuse Filters: Fast and Smaller Than Xor Filters", ACM
Journal of Experimental Algorithmics 27, 2022 (the xor filter it refines: Graf and Lemire, "Xor
Filters: Faster and Smaller Than Bloom and Cuckoo Filters", JEA 25, 2020). This module is our own
reading of the papers' description; the hashing, layout and construction order below are ours.

The structure. An array of `slots` r-bit values, cut into segments of L = 2^e slots. A key picks a
start segment s uniformly among `segment_count` and one slot in each of the `arity` consecutive
segments s, s+1, ..., s+arity-1 (so slots = (segment_count + arity - 1) L). The filter holds a
member when the XOR of its arity slot values equals its r-bit fingerprint; a non-member's
fingerprint is independent of its slots, so it matches with probability 2^-r. Filling the array
is solving one XOR equation per member: peel the hypergraph (a slot touched by one remaining key
belongs to that key; remove the key, repeat), then assign slots in reverse peeling order. Spatial
coupling (neighbouring segments) is what lets peeling succeed at about 1.13 (3-wise) or 1.08
(4-wise) slots per key for large sets; small sets need more (`tamis.sizing.fuse_layout`).

Hashing. Every key is hashed once with xxh3_128 under the artifact's hash seed, as for Bloom
filters (`tamis.bloom.hash_keys`): a = low, b = high 64 bits. The filter's own 64-bit `seed` then
remixes them, so a failed construction retries with the next seed without rehashing keys:

    k = seed * 0x9E3779B97F4A7C15 (mod 2^64)     (the 64-bit golden-ratio increment)
    p = mix64(a XOR k);  q = mix64(b XOR k)
    mix64(z): z ^= z >> 30; z *= 0xBF58476D1CE4E5B9; z ^= z >> 27; z *= 0x94D049BB133111EB; z ^= z >> 31
    start segment   s = ((p >> 32) * segment_count) >> 32
    fingerprint     p & (2^r - 1)
    slot j          (s + j) L + ((q >> 16 j) & (L - 1)),   j = 0 .. arity-1

mix64 is the finaliser of SplitMix64 (G. L. Steele, D. Lea, C. H. Flood, "Fast splittable
pseudorandom number generators", OOPSLA 2014). L is at most 2^16 so four 16-bit offsets fit in q,
and segment_count below 2^32 keeps (p >> 32) * segment_count inside 64 bits.

Storage. Slot i holds bits [i r, (i+1) r) of the little-endian uint64 `words`, least significant
bit first (so r bits per slot really cost r bits); bits past slots * r are zero.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import xxhash

from tamis.bloom import KeyHashes, check_seed, hash_keys
from tamis.sizing import FUSE_ARITIES, FUSE_MAX_SEGMENT_LENGTH, FUSE_MAX_WIDTH, FuseLayout, fuse_layout

_LOW64 = (1 << 64) - 1
# The 64-bit golden-ratio increment (2^64 / phi, odd): consecutive seeds give unrelated k.
SEED_STEP = 0x9E3779B97F4A7C15
# SplitMix64's finaliser constants (Steele, Lea, Flood, OOPSLA 2014); changing them changes every filter.
MIX_1 = 0xBF58476D1CE4E5B9
MIX_2 = 0x94D049BB133111EB
OFFSET_BITS = 16  # bits of q per slot offset: L <= 2^16 (FUSE_MAX_SEGMENT_LENGTH)
# Construction: seeds tried at each size before the array grows, and the growth steps of the
# size factor. A seed fails with a probability of a few percent at the published factors (more in
# the sizes where the segment length jumps, see tamis.sizing), so four seeds and then a
# larger array make a failure of every step vanishingly rare; `build_fuse` returns None then and
# the filters stage falls back to a Bloom filter.
SEEDS_PER_SIZE = 4
SIZE_GROWTH = (1.0, 1.0625, 1.125, 1.25, 1.5)


def _mix64(z: np.ndarray) -> np.ndarray:
    """SplitMix64's finaliser on uint64 arrays (multiplication wraps modulo 2^64)."""
    z = z ^ (z >> np.uint64(30))
    z *= np.uint64(MIX_1)
    z ^= z >> np.uint64(27)
    z *= np.uint64(MIX_2)
    z ^= z >> np.uint64(31)
    return z


def _mix64_int(z: int) -> int:
    z ^= z >> 30
    z = (z * MIX_1) & _LOW64
    z ^= z >> 27
    z = (z * MIX_2) & _LOW64
    return z ^ (z >> 31)


def seed_key(seed: int) -> int:
    """k = seed * SEED_STEP mod 2^64, the value XORed into both hash halves."""
    return (int(seed) * SEED_STEP) & _LOW64


@dataclass(frozen=True, eq=False)
class FuseFilter:
    """A binary fuse filter: `arity` slots per key in segments of `segment_length`, r = `width`-bit
    fingerprints packed in uint64 `words`; keys hashed with xxh3_128 under `hash_seed`, the hashes
    remixed by `seed` (see the module docstring).

    Build one with `build_fuse`; wrap stored words with `FuseFilter.from_words`. Read-only.
    """

    arity: int
    width: int
    seed: int
    segment_length: int
    segment_count: int
    words: np.ndarray
    hash_seed: int

    hashed = True  # its answer needs the key's hash

    @property
    def layout(self) -> FuseLayout:
        return FuseLayout(self.arity, self.segment_length, self.segment_count)

    @classmethod
    def from_words(
        cls, words: np.ndarray, arity: int, width: int, seed: int, segment_length: int, segment_count: int, hash_seed: int
    ) -> FuseFilter:
        """Wrap existing words, checking that they fit the parameters."""
        for name, value in (("arity", arity), ("width", width), ("segment_length", segment_length), ("segment_count", segment_count)):
            if type(value) is not int and not isinstance(value, np.integer):
                raise ValueError(f"a binary fuse filter's {name} must be an integer, got {value!r}")
        if arity not in FUSE_ARITIES:
            raise ValueError(f"a binary fuse filter's arity must be one of {FUSE_ARITIES}, got {arity}")
        if not 1 <= width <= FUSE_MAX_WIDTH:
            raise ValueError(f"a binary fuse filter's fingerprint width must be 1 to {FUSE_MAX_WIDTH} bits, got {width}")
        if not (1 <= segment_length <= FUSE_MAX_SEGMENT_LENGTH and segment_length & (segment_length - 1) == 0):
            raise ValueError(f"a binary fuse filter's segment length must be a power of two up to 2^16, got {segment_length}")
        if not 1 <= segment_count < 2**32:
            raise ValueError(f"a binary fuse filter's segment count must lie in [1, 2^32), got {segment_count}")
        check_seed(seed)
        check_seed(hash_seed)
        layout = FuseLayout(int(arity), int(segment_length), int(segment_count))
        expected = layout.word_count(int(width))
        if words.dtype != np.uint64 or words.shape != (expected,):
            raise ValueError(
                f"a binary fuse filter of {layout.slots} slots of {width} bits needs {expected} uint64 words, "
                f"got dtype {words.dtype} and shape {words.shape}"
            )
        return cls(int(arity), int(width), int(seed), int(segment_length), int(segment_count), words, int(hash_seed))

    def query(self, keys) -> np.ndarray:
        """For each key (bytes), True when it may be in the filter, False when it surely is not."""
        return self.query_hashes(hash_keys(keys, self.hash_seed))

    def query_hashes(self, key_hashes: KeyHashes) -> np.ndarray:
        """`query` for keys already hashed with xxh3_128 under `hash_seed` (the numpy reference;
        `tamis.compiled._fuse_hit` is its compiled twin)."""
        slots, fingerprints = key_slots(key_hashes, self.layout, self.width, self.seed)
        combined = fingerprints
        for row in slots:
            combined = combined ^ read_slots(self.words, row, self.width)
        return combined == 0

    def contains(self, key: bytes) -> bool:
        """`query` for one key, in plain Python integers (same slots, no array set-up)."""
        value = xxhash.xxh3_128_intdigest(key, self.hash_seed)
        k = seed_key(self.seed)
        p = _mix64_int((value & _LOW64) ^ k)
        q = _mix64_int((value >> 64) ^ k)
        width, length, words = self.width, self.segment_length, self.words
        start = ((p >> 32) * self.segment_count) >> 32
        combined = p & ((1 << width) - 1)
        for j in range(self.arity):
            slot = (start + j) * length + ((q >> (OFFSET_BITS * j)) & (length - 1))
            bit = slot * width
            window = words.item(bit >> 6) >> (bit & 63)
            if (bit & 63) + width > 64:
                window |= words.item((bit >> 6) + 1) << (64 - (bit & 63))
            combined ^= window & ((1 << width) - 1)
        return combined == 0

    @property
    def nbytes(self) -> int:
        """Bytes taken by the packed fingerprints."""
        return self.words.nbytes


def key_slots(key_hashes: KeyHashes, layout: FuseLayout, width: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """The slots (int64, shape (arity, n)) and r-bit fingerprints (uint64, n) of hashed keys."""
    k = np.uint64(seed_key(seed))
    p = _mix64(key_hashes.low ^ k)
    q = _mix64(key_hashes.high ^ k)
    start = ((p >> np.uint64(32)) * np.uint64(layout.segment_count)) >> np.uint64(32)
    length = np.uint64(layout.segment_length)
    slots = np.empty((layout.arity, len(key_hashes)), dtype=np.int64)
    for j in range(layout.arity):
        offset = (q >> np.uint64(OFFSET_BITS * j)) & (length - np.uint64(1))
        slots[j] = ((start + np.uint64(j)) * length + offset).astype(np.int64)
    return slots, p & np.uint64((1 << width) - 1)


def read_slots(words: np.ndarray, slots: np.ndarray, width: int) -> np.ndarray:
    """The r-bit values at the given slot numbers (uint64): bits [i r, (i+1) r) of the words."""
    bit = slots.astype(np.uint64) * np.uint64(width)
    index = bit >> np.uint64(6)
    shift = bit & np.uint64(63)
    value = words[index] >> shift
    # A value that runs past its word continues at the bottom of the next one (then shift >= 33).
    spills = shift + np.uint64(width) > np.uint64(64)
    following = words[np.minimum(index + np.uint64(1), np.uint64(len(words) - 1))]
    value |= np.where(spills, following << ((np.uint64(64) - shift) & np.uint64(63)), np.uint64(0))
    return value & np.uint64((1 << width) - 1)


def pack_slots(values: np.ndarray, width: int) -> np.ndarray:
    """uint64 words holding values[i] (each < 2^width) at bits [i r, (i+1) r), zero beyond."""
    bits = ((values.astype(np.uint64)[:, None] >> np.arange(width, dtype=np.uint64)) & np.uint64(1)).astype(np.uint8)
    packed = np.packbits(bits.ravel(), bitorder="little")
    words = np.zeros(-(-len(values) * width // 64), dtype=np.uint64)
    words.view(np.uint8)[: len(packed)] = packed
    return words


def distinct_hashes(key_hashes: KeyHashes) -> KeyHashes:
    """The hashes with repeats removed (a duplicate key would make peeling impossible), sorted."""
    if len(key_hashes) < 2:
        return key_hashes
    order = np.lexsort((key_hashes.high, key_hashes.low))
    low, high = key_hashes.low[order], key_hashes.high[order]
    keep = np.concatenate(([True], (low[1:] != low[:-1]) | (high[1:] != high[:-1])))
    return KeyHashes(low[keep], high[keep])


def peel(slots: np.ndarray, total_slots: int) -> list[tuple[np.ndarray, np.ndarray]] | None:
    """Peel the hypergraph of keys (columns of `slots`) over `total_slots` slots.

    Rounds: every slot touched by exactly one remaining key gives that key to the slot (a key alone
    in several slots takes the lowest); those keys leave together, and only the slots they touched
    can become alone next. Returns the rounds as (keys, their slots), or None when some keys can
    never be peeled (a 2-core remains: retry with another seed or more slots).
    """
    arity, n = slots.shape
    flat = slots.ravel()
    owners = np.tile(np.arange(n, dtype=np.int64), arity)
    count = np.bincount(flat, minlength=total_slots)
    # XOR of the key numbers touching each slot: when one key is left it is that key's number.
    xor_keys = np.zeros(total_slots, dtype=np.int64)
    np.bitwise_xor.at(xor_keys, flat, owners)
    lowest = np.full(n, total_slots, dtype=np.int64)  # per key, its lowest lone slot this round
    rounds, peeled = [], 0
    frontier = np.flatnonzero(count == 1)
    while frontier.size:
        # frontier: distinct slots, each touched by one key; a key alone in several keeps the lowest
        candidates = xor_keys[frontier]
        np.minimum.at(lowest, candidates, frontier)
        first = lowest[candidates] == frontier
        keys, own = candidates[first], frontier[first]
        lowest[keys] = total_slots
        rounds.append((keys, own))
        peeled += keys.size
        theirs = slots[:, keys].ravel()
        np.subtract.at(count, theirs, 1)
        np.bitwise_xor.at(xor_keys, theirs, np.tile(keys, arity))
        theirs = theirs[count[theirs] == 1]
        theirs.sort()
        frontier = theirs[_first_of_runs(theirs)]
    return rounds if peeled == n else None


def _first_of_runs(ordered: np.ndarray) -> np.ndarray:
    """Mask of the first element of every run of equal values in a sorted array."""
    mask = np.ones(ordered.size, dtype=bool)
    mask[1:] = ordered[1:] != ordered[:-1]
    return mask


def assign(rounds, slots: np.ndarray, fingerprints: np.ndarray, total_slots: int) -> np.ndarray:
    """Slot values (uint64) making the XOR of every key's slots equal its fingerprint.

    In reverse peeling order each key's own slot is still 0 and its other slots are final (they
    belong to keys peeled later, or to nobody), so own = fingerprint XOR all its slots.
    """
    values = np.zeros(total_slots, dtype=np.uint64)
    for keys, own in reversed(rounds):
        combined = fingerprints[keys].copy()
        for row in slots:
            combined ^= values[row[keys]]
        values[own] = combined
    return values


def build_fuse(key_hashes: KeyHashes, width: int, arity: int, hash_seed: int, seed: int = 0) -> FuseFilter | None:
    """A binary fuse filter of these keys, hashed under hash_seed (duplicates allowed), with
    r = width bits.

    Tries seeds seed, seed + 1, ... (SEEDS_PER_SIZE at each size), growing the array by
    SIZE_GROWTH when every seed of a size fails; the seed that worked is stored in the filter.
    Returns None when every attempt failed (the caller falls back to a Bloom filter).
    """
    check_seed(seed)
    keys = distinct_hashes(key_hashes)
    attempt = 0
    for growth in SIZE_GROWTH:
        layout = fuse_layout(len(keys), arity, growth)
        for _ in range(SEEDS_PER_SIZE):
            trial = (int(seed) + attempt) % 2**64
            attempt += 1
            slots, fingerprints = key_slots(keys, layout, width, trial)
            rounds = peel(slots, layout.slots)
            if rounds is not None:
                values = assign(rounds, slots, fingerprints, layout.slots)
                words = pack_slots(values, width)
                return FuseFilter(arity, width, trial, layout.segment_length, layout.segment_count, words, int(hash_seed))
    return None
