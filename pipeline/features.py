"""Key features: the bytes of each key to a row of float32 numbers, for string keys in general.

The same code runs at build time and in the loader, so it imports only numpy. Every value is an
integer count, or a ratio of two integer counts computed as one float64 division and rounded once to
float32; no log or exp. Any conforming implementation therefore computes bit-identical features
(invariant 2), and the compiled model assigns every key to the same region.

Features, in column order (`feature_names` lists them):
  length            bytes in the key
  n_<class>         bytes of each class: lower, upper, digit, separator (_ - . space), other ASCII,
                    non-ASCII (UTF-8 lead and continuation bytes)
  share_<class>     n_<class> / length for lower, upper, digit, separator, non-ASCII
  vowels            ASCII vowels, either case
  distinct          distinct byte values in the key
  runs              maximal runs of one class
  digit_runs        runs of digits
  longest_digits    the longest digit run
  lead_digits       the digit run at the start (0 if the key starts otherwise)
  tail_digits       the digit run at the end
  class_first, class_last    class code (0..5) of the first and last byte
  first, last       first and last byte, ASCII letters folded to lower case
  prefix2, suffix2  hash bucket of the first two and last two folded bytes (a one-byte key pairs
                    its byte with itself)
  bigram_<b>        counts of folded byte pairs falling in each hash bucket
  trigram_<b>       counts of folded byte triples falling in each hash bucket
An empty key has every feature 0.

Two implementations compute the same values: `featurize_packed` (and `featurize` on a list) works
on a whole batch with numpy, one pass per quantity over all bytes of a chunk of keys, with no Python
per key; `featurize_one` is plain Python for a single key, where array set-up would dominate. These
are the reference; the compiled query path (`tamis.compiled`, chosen in `tamis.query`) computes the
same values key by key and must match them bit for bit (tests/test_compiled.py).
"""

from __future__ import annotations

import operator
from array import array
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from tamis.format import FEATURES_VERSION

CLASSES = ("lower", "upper", "digit", "separator", "other", "nonascii")
_LOWER, _UPPER, _DIGIT, _SEPARATOR, _OTHER, _NONASCII = range(len(CLASSES))
_SHARED_CLASSES = (_LOWER, _UPPER, _DIGIT, _SEPARATOR, _NONASCII)
_SEPARATORS = b"_-. "
_VOWELS = b"aeiouAEIOU"

# Knuth's multiplicative hashing constant (2^32 / golden ratio, rounded to odd); the top bits of
# the 32-bit product spread consecutive n-gram codes evenly over the buckets. Changing it changes
# every feature value, so it is part of FEATURES_VERSION.
_GOLDEN32 = 2654435761
_MASK32 = 0xFFFFFFFF

# Features before the two n-gram blocks: length, 6 class counts, 5 shares, 7 vowel/distinct/run
# figures, 6 edge figures (see the module docstring).
_FIXED_FEATURES = 1 + len(CLASSES) + len(_SHARED_CLASSES) + 7 + 6
_SHARE_COLUMNS = slice(1 + len(CLASSES), 1 + len(CLASSES) + len(_SHARED_CLASSES))

# Keys are featurized in chunks of this many, so that the work arrays of one chunk (a few hundred
# KB for keys of a dozen bytes, the histogram about 650 KB) stay in the CPU's second-level cache.
# Measured on one core of a shared 2-core machine for the demo handles (11 bytes on average):
# 1,024 to 4,096 keys a chunk within the noise of each other. The values do not depend on it.
_CHUNK_KEYS = 2_048


def _class_table() -> bytes:
    table = bytearray([_OTHER]) * 256
    table[ord("a") : ord("z") + 1] = bytes([_LOWER]) * 26
    table[ord("A") : ord("Z") + 1] = bytes([_UPPER]) * 26
    table[ord("0") : ord("9") + 1] = bytes([_DIGIT]) * 10
    for byte in _SEPARATORS:
        table[byte] = _SEPARATOR
    table[128:] = bytes([_NONASCII]) * 128
    return bytes(table)


def _fold_table() -> bytes:
    return bytes(b + 32 if ord("A") <= b <= ord("Z") else b for b in range(256))


# The batch path tallies every byte under one code of 0..7: its class, except that vowels get
# their own codes (a lower-case vowel 6, an upper-case one 7), so one count yields both the class
# counts and the vowels. Adding 8 when the byte starts a run of its class gives 16 codes, whose
# counts also give the runs and the digit runs.
_LOWER_VOWEL, _UPPER_VOWEL = 6, 7
_TALLY_CODES = 8
_RUN_CODES = 2 * _TALLY_CODES


def _tally_table() -> bytes:
    table = bytearray(_class_table())
    for byte in _VOWELS:
        table[byte] = _LOWER_VOWEL if byte >= ord("a") else _UPPER_VOWEL
    return bytes(table)


# bytes.translate tables (both paths translate the key bytes through them)
_CLASS_BYTES = _class_table()
_FOLD_BYTES = _fold_table()
_TALLY_BYTES = _tally_table()


@dataclass(frozen=True)
class FeatureLayout:
    """A checked feature spec: the three bucket counts (powers of two) and what follows from them."""

    bigram_buckets: int
    trigram_buckets: int
    affix_buckets: int

    @property
    def count(self) -> int:
        return _FIXED_FEATURES + self.bigram_buckets + self.trigram_buckets

    @property
    def spec(self) -> dict:
        """The msgpack-able spec this layout was checked from."""
        return {
            "version": FEATURES_VERSION,
            "bigram_buckets": self.bigram_buckets,
            "trigram_buckets": self.trigram_buckets,
            "affix_buckets": self.affix_buckets,
        }

    @cached_property
    def kernel_tables(self) -> tuple[np.ndarray, ...]:
        """The arguments `tamis.compiled` kernels take for this layout: the class, fold and
        vowel tables (256 entries each) and [bigram shift, trigram shift, affix shift, column of
        the first bigram bucket, column of the first trigram bucket]."""
        is_vowel = np.zeros(256, dtype=np.uint8)
        is_vowel[list(_VOWELS)] = 1
        shifts = [_shift(self.bigram_buckets), _shift(self.trigram_buckets), _shift(self.affix_buckets),
                  _FIXED_FEATURES, _FIXED_FEATURES + self.bigram_buckets]
        return (np.frombuffer(_CLASS_BYTES, dtype=np.uint8), np.frombuffer(_FOLD_BYTES, dtype=np.uint8),
                is_vowel, np.array(shifts, dtype=np.int64))


def default_feature_spec() -> dict:
    """The feature set the build uses unless the config says otherwise (stored in the artifact)."""
    return {"version": FEATURES_VERSION, "bigram_buckets": 32, "trigram_buckets": 32, "affix_buckets": 64}


def feature_layout(spec: Mapping | FeatureLayout) -> FeatureLayout:
    """The spec checked (raises ValueError unless this module computes it); a layout passes as is."""
    if isinstance(spec, FeatureLayout):
        return spec
    if not isinstance(spec, Mapping):
        raise ValueError(f"a feature spec must be a map, got {type(spec).__name__}")
    if spec.get("version") != FEATURES_VERSION:
        raise ValueError(f"feature spec version {spec.get('version')!r} is not supported (this build knows {FEATURES_VERSION})")
    for name in ("bigram_buckets", "trigram_buckets", "affix_buckets"):
        value = spec.get(name)
        if type(value) is not int or value < 1 or value > 1 << 16 or value & (value - 1):
            raise ValueError(f"feature spec {name} must be a power of two from 1 to 65536, got {value!r}")
    layout = FeatureLayout(spec["bigram_buckets"], spec["trigram_buckets"], spec["affix_buckets"])
    if layout.count > 255:
        raise ValueError(f"feature spec gives {layout.count} features; at most 255 fit a uint8 index")
    return layout


def feature_names(spec: Mapping | FeatureLayout) -> list[str]:
    layout = feature_layout(spec)
    names = ["length"]
    names += [f"n_{c}" for c in CLASSES]
    names += [f"share_{CLASSES[c]}" for c in _SHARED_CLASSES]
    names += ["vowels", "distinct", "runs", "digit_runs", "longest_digits", "lead_digits", "tail_digits"]
    names += ["class_first", "class_last", "first", "last", "prefix2", "suffix2"]
    names += [f"bigram_{b}" for b in range(layout.bigram_buckets)]
    names += [f"trigram_{b}" for b in range(layout.trigram_buckets)]
    return names


def feature_count(spec: Mapping | FeatureLayout) -> int:
    return feature_layout(spec).count


def _shift(buckets: int) -> int:
    """Right shift that keeps the top log2(buckets) bits of a 32-bit product."""
    return 33 - buckets.bit_length()


# ---------------------------------------------------------------------------------------------------
# One key, in plain Python
# ---------------------------------------------------------------------------------------------------

# The class byte of the digits, and a table that turns a key's classes into b"d" for a digit and a
# space for anything else, so that bytes.split() gives its runs of digits.
_DIGIT_CLASS = bytes([_DIGIT])
_DIGIT_RUNS = bytes(ord("d") if code == _DIGIT else ord(" ") for code in range(256))
# Integers below 2^24 are exact in float32 (a 24-bit significand, IEEE 754).
_FLOAT32_EXACT = 1 << 24


def _bucket_of(code: int, shift: int) -> int:
    return ((code * _GOLDEN32) & _MASK32) >> shift


def featurize_one(key: bytes, spec: Mapping | FeatureLayout) -> list[float]:
    """The feature row of one key as Python floats, each exactly the float32 `featurize` gives."""
    layout = feature_layout(spec)
    row = [0.0] * layout.count
    length = len(key)
    if not length:
        return row
    classes = key.translate(_CLASS_BYTES)
    folded = key.translate(_FOLD_BYTES)
    counts = [classes.count(c) for c in range(len(CLASSES))]
    digit_lengths = list(map(len, classes.translate(_DIGIT_RUNS).split()))  # each run of digits, by bytes.split
    affix = _shift(layout.affix_buckets)
    fixed = [
        length,
        *counts,
        *array("f", [counts[c] / length for c in _SHARED_CLASSES]).tolist(),  # float64 divisions rounded once, as in the batch path
        length - len(key.translate(None, _VOWELS)),
        len(set(key)),
        1 + sum(map(operator.ne, classes, classes[1:])),  # runs: one more than the class changes
        len(digit_lengths),
        max(digit_lengths, default=0),
        length - len(classes.lstrip(_DIGIT_CLASS)),
        length - len(classes.rstrip(_DIGIT_CLASS)),
        classes[0],
        classes[-1],
        folded[0],
        folded[-1],
        _bucket_of(folded[0] << 8 | folded[min(1, length - 1)], affix),
        _bucket_of(folded[max(length - 2, 0)] << 8 | folded[-1], affix),
    ]
    row[:_FIXED_FEATURES] = map(float, fixed)
    bigram_shift, trigram_shift = _shift(layout.bigram_buckets), _shift(layout.trigram_buckets)
    trigram_base = _FIXED_FEATURES + layout.bigram_buckets
    pairs = [a << 8 | b for a, b in zip(folded, folded[1:])]
    for code in pairs:  # _bucket_of, written out: this loop is the single-key path's hot spot
        row[_FIXED_FEATURES + (((code * _GOLDEN32) & _MASK32) >> bigram_shift)] += 1
    for code, c in zip(pairs, folded[2:]):
        row[trigram_base + ((((code << 8 | c) * _GOLDEN32) & _MASK32) >> trigram_shift)] += 1
    # every value but the shares is a count of at most `length`: exact in float32 below 2^24
    return row if length < _FLOAT32_EXACT else array("f", row).tolist()


# ---------------------------------------------------------------------------------------------------
# A batch, in numpy
# ---------------------------------------------------------------------------------------------------


def pack_keys(keys: Sequence[bytes]) -> tuple[np.ndarray, np.ndarray]:
    """All keys as one uint8 buffer plus int64 offsets (n + 1 of them): key i is data[off[i]:off[i+1]]."""
    lengths = np.fromiter(map(len, keys), dtype=np.int64, count=len(keys))
    offsets = np.zeros(len(keys) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    data = np.frombuffer(b"".join(keys), dtype=np.uint8)
    return data, offsets


def featurize(keys: Sequence[bytes], spec: Mapping | FeatureLayout) -> np.ndarray:
    """Feature matrix, float32 of shape (len(keys), feature_count(spec))."""
    return featurize_packed(*pack_keys(keys), spec)


def check_packed(data: np.ndarray, offsets: np.ndarray) -> None:
    """Raise ValueError unless data is 1-d uint8 and offsets 1-d int64, ascending from 0 to len(data)."""
    if not (isinstance(data, np.ndarray) and data.dtype == np.uint8 and data.ndim == 1):
        raise ValueError("packed keys need a 1-d uint8 data array")
    if not (isinstance(offsets, np.ndarray) and offsets.dtype == np.int64 and offsets.ndim == 1 and len(offsets)):
        raise ValueError("packed keys need a non-empty 1-d int64 offsets array")
    if offsets[0] != 0 or offsets[-1] != len(data) or (np.diff(offsets) < 0).any():
        raise ValueError(f"offsets must ascend from 0 to len(data) = {len(data)}")


def featurize_packed(data: np.ndarray, offsets: np.ndarray, spec: Mapping | FeatureLayout) -> np.ndarray:
    """Feature matrix (n, d) of keys packed as by `pack_keys`."""
    columns = featurize_columns(data, offsets, spec)
    return np.ascontiguousarray(columns.T)


def featurize_columns(data: np.ndarray, offsets: np.ndarray, spec: Mapping | FeatureLayout) -> np.ndarray:
    """The transpose of `featurize_packed`: float32 of shape (d, n), one contiguous row per feature
    (the layout `tamis.trees.score_columns` reads, and the one numpy fills fastest)."""
    layout = feature_layout(spec)
    check_packed(data, offsets)
    n = len(offsets) - 1
    columns = np.empty((layout.count, n), dtype=np.float32)
    for start in range(0, n, _CHUNK_KEYS):
        stop = min(start + _CHUNK_KEYS, n)
        chunk_offsets = offsets[start : stop + 1] - offsets[start]
        _featurize_chunk(data[offsets[start] : offsets[stop]], chunk_offsets, layout, columns[:, start:stop])
    return columns


def _bucket(code: np.ndarray, buckets: int) -> np.ndarray:
    """Multiplicative hash of uint32 codes into `buckets` (a power of two) buckets, uint32.

    uint32 multiplication wraps modulo 2^32, which is the low 32 bits of the exact product.
    """
    if buckets == 1:
        return np.zeros(len(code), dtype=np.uint32)
    product = np.multiply(code, np.uint32(_GOLDEN32), dtype=np.uint32)
    product >>= np.uint32(_shift(buckets))
    return product


def _ngram_buckets(folded: bytes, size: int, buckets: int) -> np.ndarray:
    """Bucket of the n-gram of `size` (2 or 3) bytes starting at every position p of folded (which
    ends in 2 padding bytes): len(folded) - 1 - size entries, uint32.

    The code of the n-gram is its bytes read as one big-endian integer; numpy reads it straight
    from the buffer through an unaligned view with a stride of one byte.
    """
    count = len(folded) - 1 - size
    if count <= 0:
        return np.zeros(0, dtype=np.uint32)
    if size == 2:
        code = np.ndarray(shape=(count,), dtype=">u2", buffer=folded, strides=(1,)).astype(np.uint32)
    else:  # four bytes from p, of which the top three are the trigram
        code = np.ndarray(shape=(count,), dtype=">u4", buffer=folded, strides=(1,)) >> np.uint32(8)
    return _bucket(code, buckets)


def _crossing(first_at: np.ndarray, lengths: np.ndarray, size: int, count: int) -> np.ndarray:
    """Positions p < count whose n-gram of `size` (2 or 3) bytes crosses into another key, each once.

    first_at and lengths describe the non-empty keys in order. The n-gram at p crosses when a key
    starts at b = p + 1 or (for a trigram) b = p + 2; p = b - 2 is also b' - 1 for the key before
    when that key holds a single byte, so that case is left to b'.
    """
    later = first_at[1:]
    crossing = later - 1
    if size == 3:
        two_back = later[lengths[:-1] > 1] - 2
        crossing = np.concatenate([crossing, two_back[two_back >= 0]])
    return crossing[crossing < count]


def _distinct_bytes(data: np.ndarray, key_of: np.ndarray, n: int) -> np.ndarray:
    """How many distinct byte values each key holds, from a seen-table of n x 256 flags."""
    seen = np.zeros((n, 256), dtype=np.uint8)
    seen.reshape(-1)[(key_of << np.uint32(8)) | data] = 1
    # Summing the flags as uint64 words adds 8 byte lanes at once (each lane <= 32, no carry);
    # folding the lanes in pairs into 16-bit lanes then sums them without overflow (total <= 256).
    lanes = seen.view(np.uint64).sum(axis=1, dtype=np.uint64)
    pairs = (lanes & np.uint64(0x00FF00FF00FF00FF)) + ((lanes >> np.uint64(8)) & np.uint64(0x00FF00FF00FF00FF))
    return (pairs * np.uint64(0x0001000100010001)) >> np.uint64(48)


def _featurize_chunk(data: np.ndarray, offsets: np.ndarray, layout: FeatureLayout, columns: np.ndarray) -> None:
    """Fill columns (d, n) with the features of the n keys packed in data and offsets."""
    n = len(offsets) - 1
    total = len(data)
    lengths = np.diff(offsets)
    nonempty = np.flatnonzero(lengths)
    first_at = offsets[nonempty]
    last_at = offsets[nonempty + 1] - 1
    key_of = np.repeat(np.arange(n, dtype=np.uint32), lengths)
    raw = data.tobytes()  # bytes.translate maps bytes through a table faster than a numpy gather
    cls = np.frombuffer(raw.translate(_CLASS_BYTES), dtype=np.uint8)
    folded_bytes = raw.translate(_FOLD_BYTES) + bytes(2)
    folded = np.frombuffer(folded_bytes, dtype=np.uint8, count=total)

    # One histogram over `width` codes per key, code-major (counts[c, i] at c * n + i): the bigram
    # buckets, the trigram buckets, then 16 tally codes (class or vowel, +8 at a run start). Every
    # n-gram is first counted for the key of its first byte; those that cross into the next key
    # are then taken off again.
    bigrams, trigrams = layout.bigram_buckets, layout.trigram_buckets
    tally_at = bigrams + trigrams
    width = tally_at + _RUN_CODES
    run_start = np.empty(total, dtype=bool)
    np.not_equal(cls[1:], cls[:-1], out=run_start[1:])
    run_start[first_at] = True
    tally = np.frombuffer(raw.translate(bytes(c + tally_at for c in _TALLY_BYTES)), dtype=np.uint8)
    tally = tally + (run_start.view(np.uint8) << np.uint8(3))
    pairs, triples = max(total - 1, 0), max(total - 2, 0)
    index = np.empty(total + pairs + triples, dtype=np.uint32)
    of_tally, of_pairs, of_triples = np.split(index, [total, total + pairs])
    np.multiply(tally, np.uint32(n), out=of_tally, dtype=np.uint32)
    np.multiply(_ngram_buckets(folded_bytes, 2, bigrams), np.uint32(n), out=of_pairs)
    trigram_codes = _ngram_buckets(folded_bytes, 3, trigrams)
    trigram_codes += np.uint32(bigrams)
    np.multiply(trigram_codes, np.uint32(n), out=of_triples)
    for part in (of_tally, of_pairs, of_triples):
        part += key_of[: len(part)]
    histogram = np.bincount(index, minlength=width * n)
    for counted, size in ((of_pairs, 2), (of_triples, 3)):
        np.subtract.at(histogram, counted[_crossing(first_at, lengths[nonempty], size, len(counted))], 1)
    histogram = histogram.reshape(width, n)

    tallies = histogram[tally_at : tally_at + _TALLY_CODES] + histogram[tally_at + _TALLY_CODES :]
    class_counts = tallies[: len(CLASSES)]
    class_counts[_LOWER] += tallies[_LOWER_VOWEL]
    class_counts[_UPPER] += tallies[_UPPER_VOWEL]
    runs = histogram[tally_at + _TALLY_CODES :].sum(axis=0)

    # digit runs: the length of every run (runs are in key order), 0 for runs of another class
    starts = np.flatnonzero(run_start)
    run_length = np.diff(starts, append=total)
    digit_length = np.where(cls[starts] == _DIGIT, run_length, 0)
    key_runs = runs[nonempty]
    first_run = np.cumsum(key_runs) - key_runs

    columns[0] = lengths
    columns[1 : 1 + len(CLASSES)] = class_counts
    # one float64 division, rounded once to float32 on assignment
    columns[_SHARE_COLUMNS] = class_counts[list(_SHARED_CLASSES)] / np.maximum(lengths, 1).astype(np.float64)
    row = _SHARE_COLUMNS.stop
    columns[row] = tallies[_LOWER_VOWEL] + tallies[_UPPER_VOWEL]
    columns[row + 1] = _distinct_bytes(data, key_of, n)
    columns[row + 2] = runs
    columns[row + 3] = histogram[tally_at + _TALLY_CODES + _DIGIT]
    edges = columns[row + 4 : _FIXED_FEATURES]
    if len(nonempty) < n:
        edges[:] = 0
    if len(nonempty):
        where = slice(None) if len(nonempty) == n else nonempty
        first, last = folded[first_at].astype(np.uint32), folded[last_at].astype(np.uint32)
        second = folded[np.minimum(first_at + 1, last_at)].astype(np.uint32)
        before_last = folded[np.maximum(last_at - 1, first_at)].astype(np.uint32)
        edges[0, where] = np.maximum.reduceat(digit_length, first_run)  # every non-empty key has a run
        edges[1, where] = digit_length[first_run]
        edges[2, where] = digit_length[first_run + key_runs - 1]
        edges[3, where] = cls[first_at]
        edges[4, where] = cls[last_at]
        edges[5, where] = first
        edges[6, where] = last
        edges[7, where] = _bucket((first << np.uint32(8)) | second, layout.affix_buckets)
        edges[8, where] = _bucket((before_last << np.uint32(8)) | last, layout.affix_buckets)
    # counts below 2^24 are exact in float32
    columns[_FIXED_FEATURES:] = histogram[:tally_at]
