"""Key features: the bytes of each key to a row of float32 numbers, for string keys in general.

The same function runs at build time and in the loader, so it imports only numpy. Every value is an
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
  prefix2, suffix2  hash bucket of the first two and last two folded bytes
  bigram_<b>        counts of folded byte pairs falling in each hash bucket
  trigram_<b>       counts of folded byte triples falling in each hash bucket
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

FEATURES_VERSION = 1

CLASSES = ("lower", "upper", "digit", "separator", "other", "nonascii")
_LOWER, _UPPER, _DIGIT, _SEPARATOR, _OTHER, _NONASCII = range(len(CLASSES))
_SHARED_CLASSES = (_LOWER, _UPPER, _DIGIT, _SEPARATOR, _NONASCII)

# Knuth's multiplicative hashing constant (2^32 / golden ratio, rounded to odd); the top bits of
# the 32-bit product spread consecutive n-gram codes evenly over the buckets. Changing it changes
# every feature value, so it is part of FEATURES_VERSION.
_GOLDEN32 = np.uint64(2654435761)
_MASK32 = np.uint64(0xFFFFFFFF)

# Keys are featurized in chunks of this many so that the work arrays (about 1 MB each) stay in
# cache and are reused by the allocator instead of being mapped afresh for every chunk.
_CHUNK_KEYS = 8_192


def _class_table() -> np.ndarray:
    table = np.full(256, _OTHER, dtype=np.uint8)
    table[ord("a") : ord("z") + 1] = _LOWER
    table[ord("A") : ord("Z") + 1] = _UPPER
    table[ord("0") : ord("9") + 1] = _DIGIT
    for ch in "_-. ":
        table[ord(ch)] = _SEPARATOR
    table[128:] = _NONASCII
    return table


def _fold_table() -> np.ndarray:
    table = np.arange(256, dtype=np.uint8)
    table[ord("A") : ord("Z") + 1] += ord("a") - ord("A")
    return table


def _vowel_table() -> np.ndarray:
    table = np.zeros(256, dtype=bool)
    for ch in "aeiouAEIOU":
        table[ord(ch)] = True
    return table


_CLASS_OF = _class_table()
_FOLD = _fold_table()
_IS_VOWEL = _vowel_table()


def default_feature_spec() -> dict:
    """The feature set the build uses unless the config says otherwise (stored in the artifact)."""
    return {"version": FEATURES_VERSION, "bigram_buckets": 32, "trigram_buckets": 32, "affix_buckets": 64}


def feature_names(spec: Mapping) -> list[str]:
    names = ["length"]
    names += [f"n_{c}" for c in CLASSES]
    names += [f"share_{CLASSES[c]}" for c in _SHARED_CLASSES]
    names += ["vowels", "distinct", "runs", "digit_runs", "longest_digits", "lead_digits", "tail_digits"]
    names += ["class_first", "class_last", "first", "last", "prefix2", "suffix2"]
    names += [f"bigram_{b}" for b in range(spec["bigram_buckets"])]
    names += [f"trigram_{b}" for b in range(spec["trigram_buckets"])]
    return names


def feature_count(spec: Mapping) -> int:
    return len(feature_names(spec))


def check_feature_spec(spec: Mapping) -> None:
    """Raise ValueError unless `spec` is one this module computes (version and bucket counts)."""
    if spec.get("version") != FEATURES_VERSION:
        raise ValueError(f"feature spec version {spec.get('version')!r} is not supported (this build knows {FEATURES_VERSION})")
    for name in ("bigram_buckets", "trigram_buckets", "affix_buckets"):
        value = spec.get(name)
        if not isinstance(value, int) or value < 1 or value > 1 << 16 or value & (value - 1):
            raise ValueError(f"feature spec {name} must be a power of two from 1 to 65536, got {value!r}")
    if feature_count(spec) > 255:
        raise ValueError(f"feature spec gives {feature_count(spec)} features; at most 255 fit a uint8 index")


def pack_keys(keys: Sequence[bytes]) -> tuple[np.ndarray, np.ndarray]:
    """All keys as one uint8 buffer plus int64 offsets (n + 1 of them): key i is data[off[i]:off[i+1]]."""
    lengths = np.fromiter(map(len, keys), dtype=np.int64, count=len(keys))
    offsets = np.zeros(len(keys) + 1, dtype=np.int64)
    np.cumsum(lengths, out=offsets[1:])
    data = np.frombuffer(b"".join(keys), dtype=np.uint8)
    return data, offsets


def featurize(keys: Sequence[bytes], spec: Mapping) -> np.ndarray:
    """Feature matrix, float32 of shape (len(keys), feature_count(spec))."""
    check_feature_spec(spec)
    out = np.empty((len(keys), feature_count(spec)), dtype=np.float32)
    for start in range(0, len(keys), _CHUNK_KEYS):
        chunk = keys[start : start + _CHUNK_KEYS]
        featurize_packed(*pack_keys(chunk), spec, out=out[start : start + len(chunk)])
    return out


def _per_key_counts(key_of: np.ndarray, codes: np.ndarray, n: int, width: int) -> np.ndarray:
    """counts[i, c] = how many positions of key i carry code c (0 <= c < width)."""
    return np.bincount(key_of * width + codes, minlength=n * width).reshape(n, width)


def _bucket(code: np.ndarray, buckets: int) -> np.ndarray:
    """Multiplicative hash of a non-negative integer code into `buckets` (a power of two) buckets."""
    product = (code.astype(np.uint64) * _GOLDEN32) & _MASK32
    log2_buckets = buckets.bit_length() - 1
    return (product >> np.uint64(32 - log2_buckets)).astype(np.int64)


def _ngram_counts(folded: np.ndarray, key_of: np.ndarray, n: int, size: int, buckets: int) -> np.ndarray:
    """Counts per key of the folded byte n-grams of the given size, hashed into buckets."""
    count = len(folded) - size + 1
    if count <= 0:
        return np.zeros((n, buckets), dtype=np.int64)
    code = folded[:count].copy()
    for j in range(1, size):
        code = code * 256 + folded[j : j + count]
    # an n-gram lies inside one key when its last byte belongs to the same key as its first
    inside = key_of[:count] == key_of[size - 1 :]
    return _per_key_counts(key_of[:count][inside], _bucket(code[inside], buckets), n, buckets)


def _distinct_bytes(data: np.ndarray, key_of: np.ndarray, n: int) -> np.ndarray:
    """How many distinct byte values each key holds (a seen-table of n x 256 flags)."""
    seen = np.zeros((n, 256), dtype=bool)
    seen[key_of, data] = True
    return seen.sum(axis=1)


def featurize_packed(data: np.ndarray, offsets: np.ndarray, spec: Mapping, out: np.ndarray | None = None) -> np.ndarray:
    """Feature matrix of keys already packed by `pack_keys`, written into `out` when given."""
    n = len(offsets) - 1
    if out is None:
        out = np.empty((n, feature_count(spec)), dtype=np.float32)
    lengths = np.diff(offsets)
    key_of = np.repeat(np.arange(n, dtype=np.int64), lengths)
    position = np.arange(len(data), dtype=np.int64) - offsets[key_of]
    cls = _CLASS_OF[data].astype(np.int64)
    folded = _FOLD[data].astype(np.int64)
    nonempty = lengths > 0
    first_at = offsets[:-1][nonempty]
    last_at = offsets[1:][nonempty] - 1

    class_counts = _per_key_counts(key_of, cls, n, len(CLASSES))
    safe_length = np.maximum(lengths, 1).astype(np.float64)
    shares = class_counts[:, list(_SHARED_CLASSES)] / safe_length[:, None]
    vowels = np.bincount(key_of, weights=_IS_VOWEL[data], minlength=n)
    distinct = _distinct_bytes(data, key_of, n)

    # runs: maximal stretches of one class inside one key
    run_start = (position == 0) | (cls != np.roll(cls, 1))
    run_id = np.cumsum(run_start) - 1
    run_length = np.bincount(run_id)
    run_key = key_of[run_start]
    run_class = cls[run_start]
    runs = np.bincount(run_key, minlength=n)
    is_digit_run = run_class == _DIGIT
    digit_runs = np.bincount(run_key, weights=is_digit_run, minlength=n)
    longest_digits = np.zeros(n, dtype=np.int64)
    np.maximum.at(longest_digits, run_key[is_digit_run], run_length[is_digit_run])
    lead_digits = np.zeros(n, dtype=np.int64)
    tail_digits = np.zeros(n, dtype=np.int64)
    if len(data):
        first_run = run_id[first_at]
        last_run = run_id[last_at]
        lead_digits[nonempty] = np.where(run_class[first_run] == _DIGIT, run_length[first_run], 0)
        tail_digits[nonempty] = np.where(run_class[last_run] == _DIGIT, run_length[last_run], 0)

    # position-aware: the first and last bytes, and hashed two-byte prefix and suffix
    edges = np.zeros((n, 6), dtype=np.int64)
    if len(data):
        second_at = np.minimum(first_at + 1, last_at)
        before_last_at = np.maximum(last_at - 1, first_at)
        edges[nonempty, 0] = cls[first_at]
        edges[nonempty, 1] = cls[last_at]
        edges[nonempty, 2] = folded[first_at]
        edges[nonempty, 3] = folded[last_at]
        edges[nonempty, 4] = _bucket(folded[first_at] * 256 + folded[second_at], spec["affix_buckets"])
        edges[nonempty, 5] = _bucket(folded[before_last_at] * 256 + folded[last_at], spec["affix_buckets"])

    bigrams = _ngram_counts(folded, key_of, n, 2, spec["bigram_buckets"])
    trigrams = _ngram_counts(folded, key_of, n, 3, spec["trigram_buckets"])

    columns = [
        lengths[:, None],
        class_counts,
        shares,
        vowels[:, None],
        distinct[:, None],
        runs[:, None],
        digit_runs[:, None],
        longest_digits[:, None],
        lead_digits[:, None],
        tail_digits[:, None],
        edges,
        bigrams,
        trigrams,
    ]
    column = 0
    for block in columns:
        width = block.shape[1]
        out[:, column : column + width] = block  # one rounding to float32 (exact for counts < 2^24)
        column += width
    return out
