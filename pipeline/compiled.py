"""Compiled kernels (numba) for the hot loops of features, trees and Bloom probes: optional.

Each kernel computes exactly what its numpy counterpart computes, one key at a time in one pass
instead of one numpy pass per quantity: `tamis.features.featurize_columns`,
`tamis.trees.score_columns` and `tamis.bloom.BloomFilter.query_hashes` call them when
`ENABLED`, and the loader fuses features and trees per key so a key's feature row never leaves
the CPU's first-level cache. The values are bit-identical to the numpy path: integer counts,
one float64 division rounded once to float32, the same float32 comparisons, integer sums and
the same uint64 probe arithmetic (tests/test_compiled.py compares both paths).

`ENABLED` is true when numba imports and the environment variable TAMIS_NUMPY_ONLY is unset
(or "0"); otherwise this module defines nothing else and the numpy path runs alone, so the
loader still needs only numpy, xxhash and msgpack. `in_use()` is the one switch the callers
read: the kernels run when ENABLED, unless the calling thread asked for the numpy reference for a
while (`numpy_reference()`, as the verify stage does to answer through both paths). Kernels compile on first use (`cache=True`
keeps the machine code in numba's cache, beside this file or in the user's cache folder when
that is read-only); `warm_up()` compiles them all at once, which `open_filter` does.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np

NUMPY_ONLY_VARIABLE = "TAMIS_NUMPY_ONLY"


def _numba():
    if os.environ.get(NUMPY_ONLY_VARIABLE, "0") not in ("", "0"):
        return None
    try:
        import numba
    except ImportError:
        return None
    return numba


_NUMBA = _numba()
ENABLED = _NUMBA is not None

# Per thread, so that one thread answering through the numpy reference leaves every other
# thread's path as it was.
_thread = threading.local()


def in_use() -> bool:
    """True when this thread's batch path runs the compiled kernels."""
    return ENABLED and not getattr(_thread, "numpy_reference", False)


@contextmanager
def numpy_reference() -> Iterator[None]:
    """Run the numpy reference path in this thread while the context lasts."""
    before = getattr(_thread, "numpy_reference", False)
    _thread.numpy_reference = True
    try:
        yield
    finally:
        _thread.numpy_reference = before

if ENABLED:
    _jit = _NUMBA.njit(cache=True, nogil=True, boundscheck=False)

    # Column layout (tamis.features docstring): length, 6 class counts, 5 shares, vowels,
    # distinct, runs, digit_runs, longest, lead, tail digits, class first/last, first/last byte,
    # prefix2, suffix2, then the bigram and trigram buckets.
    _GOLDEN32 = np.uint64(2654435761)
    _MASK32 = np.uint64(0xFFFFFFFF)
    _DIGIT = 2  # class code of the digits, tamis.features._DIGIT
    _CLASSES = 6
    # Keys per block: a block's rows (d float32 each) are turned into columns (d, n) in
    # one go, so a key touches one cache line per feature per block instead of one per feature.
    _BLOCK = 64

    @_jit
    def _bucket(code, shift):
        return ((np.uint64(code) * _GOLDEN32) & _MASK32) >> np.uint64(shift)

    @_jit
    def _key_counts(data, start, stop, class_of, fold, is_vowel, shifts, seen, stamp, counts):
        """Features of key data[start:stop] as int64 `counts` (shares left 0): every feature of the
        numpy path is an integer but the shares, which `_row_to_float32` derives. `seen` (256
        int64) marks a byte value seen in this key by holding `stamp`, so it never needs clearing."""
        counts[:] = 0
        length = stop - start
        if length == 0:
            return
        bigram_shift, trigram_shift, affix_shift, bigram_base, trigram_base = shifts[0], shifts[1], shifts[2], shifts[3], shifts[4]
        counts[0] = length
        vowels = distinct = runs = digit_runs = longest = run = 0
        previous = -1
        for p in range(start, stop):
            byte = data[p]
            cls = class_of[byte]
            counts[1 + cls] += 1
            vowels += is_vowel[byte]
            if seen[byte] != stamp:
                seen[byte] = stamp
                distinct += 1
            if cls != previous:
                runs += 1
                if cls == _DIGIT:
                    digit_runs += 1
                run = 0
                previous = cls
            run += 1
            if cls == _DIGIT and run > longest:
                longest = run
            if p + 1 < stop:
                pair = np.int64(fold[byte]) << 8 | fold[data[p + 1]]
                counts[bigram_base + _bucket(pair, bigram_shift)] += 1
                if p + 2 < stop:
                    counts[trigram_base + _bucket(pair << 8 | fold[data[p + 2]], trigram_shift)] += 1
        first, last = data[start], data[stop - 1]
        lead = 0
        if class_of[first] == _DIGIT:
            while start + lead < stop and class_of[data[start + lead]] == _DIGIT:
                lead += 1
        tail = run if class_of[last] == _DIGIT else 0
        second, before_last = data[min(start + 1, stop - 1)], data[max(stop - 2, start)]
        at = 1 + _CLASSES + 5
        counts[at] = vowels
        counts[at + 1] = distinct
        counts[at + 2] = runs
        counts[at + 3] = digit_runs
        counts[at + 4] = longest
        counts[at + 5] = lead
        counts[at + 6] = tail
        counts[at + 7] = class_of[first]
        counts[at + 8] = class_of[last]
        counts[at + 9] = fold[first]
        counts[at + 10] = fold[last]
        counts[at + 11] = _bucket(np.int64(fold[first]) << 8 | fold[second], affix_shift)
        counts[at + 12] = _bucket(np.int64(fold[before_last]) << 8 | fold[last], affix_shift)

    @_jit
    def _row_to_float32(counts, row):
        """float32 row of the counts, with the shares n_c / length as one float64 division each
        (lower, upper, digit, separator, non-ASCII: classes 0, 1, 2, 3, 5)."""
        for f in range(len(counts)):
            row[f] = counts[f]
        length = max(counts[0], 1)
        for s, cls in enumerate((0, 1, 2, 3, 5)):
            row[1 + _CLASSES + s] = np.float64(counts[1 + cls]) / np.float64(length)

    @_jit
    def featurize_into(data, offsets, class_of, fold, is_vowel, shifts, columns):
        """Fill columns (d, n) float32 with the features of the n keys packed in data and offsets."""
        d, n = columns.shape
        seen = np.zeros(256, dtype=np.int64)
        counts = np.zeros(d, dtype=np.int64)
        rows = np.zeros((_BLOCK, d), dtype=np.float32)
        for start in range(0, n, _BLOCK):
            size = min(_BLOCK, n - start)
            for j in range(size):
                i = start + j
                _key_counts(data, offsets[i], offsets[i + 1], class_of, fold, is_vowel, shifts, seen, i + 1, counts)
                _row_to_float32(counts, rows[j])
            for f in range(d):
                for j in range(size):
                    columns[f, start + j] = rows[j, f]

    @_jit
    def _leaf_sum(x, roots, feature, threshold, first_child, value):
        """Sum of the leaf values one feature row x reaches, over the breadth-first layout of
        tamis.trees: the children of a node are adjacent, and a leaf is its own first child."""
        total = np.int64(0)
        for t in range(len(roots)):
            node = roots[t]
            while first_child[node] != node:
                node = first_child[node] + (x[feature[node]] > threshold[node])
            total += value[node]
        return total

    @_jit
    def score_rows(X, roots, feature, threshold, first_child, value, bias, scores):
        """scores[i] = bias + the leaf values row i of X (n, d) reaches in every tree."""
        for i in range(X.shape[0]):
            scores[i] = bias + _leaf_sum(X[i], roots, feature, threshold, first_child, value)

    @_jit
    def score_packed(data, offsets, class_of, fold, is_vowel, shifts, d,
                     roots, feature, threshold, first_child, value, bias, scores):
        """`score_rows` of `featurize_into`, key by key, without the feature matrix."""
        seen = np.zeros(256, dtype=np.int64)
        counts = np.zeros(d, dtype=np.int64)
        x = np.zeros(d, dtype=np.float32)
        for i in range(len(offsets) - 1):
            _key_counts(data, offsets[i], offsets[i + 1], class_of, fold, is_vowel, shifts, seen, i + 1, counts)
            _row_to_float32(counts, x)
            scores[i] = bias + _leaf_sum(x, roots, feature, threshold, first_child, value)

    @_jit
    def bloom_query(low, high, bits, probes, words, answers):
        """answers[i] = every probe bit of key i is set; positions by enhanced double hashing
        modulo bits, exactly as tamis.bloom.probe_positions computes them (all in uint64)."""
        m = np.uint64(bits)
        for i in range(len(low)):
            x = low[i] % m
            y = high[i] % m
            hit = True
            for step in range(probes):
                if step:
                    x = (x + y) % m
                    y = (y + np.uint64(step)) % m
                if not (words[x >> np.uint64(6)] >> (x & np.uint64(63))) & np.uint64(1):
                    hit = False
                    break
            answers[i] = hit
