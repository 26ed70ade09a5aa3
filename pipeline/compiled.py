"""The compiled implementation of the query path (numba, the `fast` extra): optional.

`tamis.query` chooses between this and the numpy reference, in one place; nothing else calls it.
Each kernel computes exactly what the reference computes (tests/test_compiled.py compares them bit
for bit): integer counts, one float64 division rounded once to float32 for each share, the same
float32 comparisons down the same breadth-first trees, integer sums, the same region rule and the
same uint64 probe arithmetic.

Everything a kernel reads about the artifact travels as ONE uint8 array, the query tables
(`query_tables`), because numba's dispatcher costs about as much per argument as a whole key's
features do: a single key is one call with two arguments, (its xxh3-128 digest followed by its
bytes, the tables). The tables hold, 8-byte aligned, a directory of int64 (feature count, bias,
then the byte offset and element count of each part) and the parts in `PARTS` order.

Region kinds: the region table has one row per region, (kind, first word, p0 .. p4); `_region_hit`
is the one place that dispatches on the kind, so a new filter kind is one jitted function there and
one row layout (`tamis.query` writes the rows).

`ENABLED` is true when numba imports and the environment variable TAMIS_NUMPY_ONLY is unset
(or "0"); otherwise no kernel is defined and the numpy path runs alone, so the loader still needs
only numpy, xxhash and msgpack. Kernels compile on first use (`cache=True` keeps the machine code
in numba's cache, beside this file or in the user's cache folder when that is read-only); the loader
compiles them when it opens a file (`tamis.query.CompiledPath.warm_up`).
"""

from __future__ import annotations

import os

import numpy as np

NUMPY_ONLY_VARIABLE = "TAMIS_NUMPY_ONLY"

# Region kinds in the region table (rows: kind, first word, then the kind's parameters p0 .. p4:
# Bloom bits, probes; fuse arity, width, seed key (its uint64 bits as int64), segment length, segment
# count; zero where a kind has fewer).
REGION_NO, REGION_YES, REGION_BLOOM, REGION_FUSE = 0, 1, 2, 3
REGION_ROW = 7

# The parts of the query tables, in order, with their dtypes.
PARTS = (
    ("tables", np.uint8),       # class_of | fold | is_vowel, 256 entries each (tamis.features)
    ("shifts", np.int64),       # bigram, trigram, affix shifts; first bigram column, first trigram column
    ("roots", np.int64),        # the forest's breadth-first layout (tamis.trees._LevelLayout)
    ("feature", np.int64),
    ("threshold", np.float32),
    ("first_child", np.int64),
    ("value", np.int64),
    ("boundaries", np.int64),   # the region boundaries
    ("regions", np.int64),      # the region table, REGION_ROW int64 a region
    ("words", np.uint64),       # the filter words of every region, one after another
)
_DIRECTORY = 2 + 2 * len(PARTS)  # int64 entries: features, bias, then (byte offset, count) per part


def query_tables(features: int, bias: int, parts: dict[str, np.ndarray]) -> np.ndarray:
    """The query tables as one uint8 array: the directory, then each part of `PARTS`, 8-byte aligned."""
    directory = np.zeros(_DIRECTORY, dtype=np.int64)
    directory[:2] = features, bias
    chunks, offset = [], 8 * _DIRECTORY
    for index, (name, dtype) in enumerate(PARTS):
        payload = np.ascontiguousarray(parts[name], dtype=dtype).reshape(-1)
        directory[2 + 2 * index : 4 + 2 * index] = offset, len(payload)
        padding = -payload.nbytes % 8
        chunks.append(payload.view(np.uint8))
        chunks.append(np.zeros(padding, dtype=np.uint8))
        offset += payload.nbytes + padding
    return np.concatenate([directory.view(np.uint8), *chunks])


def table_part(blob: np.ndarray, name: str) -> np.ndarray:
    """A view of one part of the query tables (`query_tables`), with its dtype."""
    index = [part for part, _ in PARTS].index(name)
    directory = blob[: 8 * _DIRECTORY].view(np.int64)
    offset, count = (int(v) for v in directory[2 + 2 * index : 4 + 2 * index])
    dtype = PARTS[index][1]
    return blob[offset : offset + count * np.dtype(dtype).itemsize].view(dtype)


def _numba():
    """numba and None, or None and why the compiled path is off."""
    if os.environ.get(NUMPY_ONLY_VARIABLE, "0") not in ("", "0"):
        return None, f"{NUMPY_ONLY_VARIABLE} is set"
    try:
        import numba
    except ImportError:
        return None, "numba is not installed (pip install 'tamis[fast]')"
    return numba, None


_NUMBA, DISABLED_BECAUSE = _numba()
ENABLED = _NUMBA is not None

if ENABLED:
    _jit = _NUMBA.njit(cache=True, nogil=True, boundscheck=False)

    # Column layout (tamis.features docstring): length, 6 class counts, 5 shares, vowels,
    # distinct, runs, digit_runs, longest, lead, tail digits, class first/last, first/last byte,
    # prefix2, suffix2, then the bigram and trigram buckets.
    _GOLDEN32 = np.uint64(2654435761)
    _MASK32 = np.uint64(0xFFFFFFFF)
    _DIGIT = 2  # class code of the digits, tamis.features._DIGIT
    _CLASSES = 6
    # Keys per block in `featurize_into`: a block's rows (d float32 each) are turned into columns
    # (d, n) in one go, so a key touches one cache line per feature per block instead of one per feature.
    _BLOCK = 64

    # --- the query tables ------------------------------------------------------------------------

    @_jit
    def _span(blob, part):
        start = blob[: 8 * _DIRECTORY].view(np.int64)[2 + 2 * part]
        return start, blob[: 8 * _DIRECTORY].view(np.int64)[3 + 2 * part]

    @_jit
    def _int64s(blob, part):
        start, count = _span(blob, part)
        return blob[start : start + 8 * count].view(np.int64)

    @_jit
    def _parts(blob):
        """(features, bias, tables, shifts, roots, feature, threshold, first_child, value,
        boundaries, regions, words) read from the query tables."""
        head = blob[: 8 * _DIRECTORY].view(np.int64)
        tables_at, tables_count = _span(blob, 0)
        threshold_at, threshold_count = _span(blob, 4)
        words_at, words_count = _span(blob, 9)
        return (head[0], head[1], blob[tables_at : tables_at + tables_count], _int64s(blob, 1), _int64s(blob, 2),
                _int64s(blob, 3), blob[threshold_at : threshold_at + 4 * threshold_count].view(np.float32),
                _int64s(blob, 5), _int64s(blob, 6), _int64s(blob, 7), _int64s(blob, 8),
                blob[words_at : words_at + 8 * words_count].view(np.uint64))

    # --- features ----------------------------------------------------------------------------------

    @_jit
    def _bucket(code, shift):
        return ((np.uint64(code) * _GOLDEN32) & _MASK32) >> np.uint64(shift)

    @_jit
    def _key_counts(data, start, stop, tables, shifts, seen, stamp, counts):
        """Features of key data[start:stop] as int64 `counts` (shares left 0): every feature of the
        numpy path is an integer but the shares, which `_row_to_float32` derives. `seen` (256
        int64) marks a byte value seen in this key by holding `stamp`, so it never needs clearing."""
        counts[:] = 0
        length = stop - start
        if length == 0:
            return
        class_of, fold, is_vowel = tables[:256], tables[256:512], tables[512:768]
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

    # --- trees, region, region answers ------------------------------------------------------------

    @_jit
    def _score(x, bias, roots, feature, threshold, first_child, value):
        """bias + the leaf values one feature row x reaches, over the breadth-first layout of
        tamis.trees: the children of a node are adjacent, and a leaf is its own first child."""
        total = np.int64(bias)
        for t in range(len(roots)):
            node = roots[t]
            while first_child[node] != node:
                node = first_child[node] + (x[feature[node]] > threshold[node])
            total += value[node]
        return total

    @_jit
    def _region(score, boundaries):
        """The number of boundaries at or below score: region i holds boundaries[i-1] <= s < boundaries[i]."""
        low, high = 0, len(boundaries)
        while low < high:
            middle = (low + high) >> 1
            if boundaries[middle] <= score:
                low = middle + 1
            else:
                high = middle
        return low

    @_jit
    def _bloom_hit(low, high, words, bits, probes):
        """Every probe bit of the key is set; positions by enhanced double hashing modulo bits,
        exactly as tamis.bloom.probe_positions computes them (all in uint64)."""
        m = np.uint64(bits)
        x = low % m
        y = high % m
        for step in range(probes):
            if step:
                x = (x + y) % m
                y = (y + np.uint64(step)) % m
            if not (words[x >> np.uint64(6)] >> (x & np.uint64(63))) & np.uint64(1):
                return False
        return True

    _MIX_1 = np.uint64(0xBF58476D1CE4E5B9)
    _MIX_2 = np.uint64(0x94D049BB133111EB)

    @_jit
    def _mix64(z):
        """SplitMix64's finaliser, as tamis.fuse._mix64 (multiplications wrap modulo 2^64)."""
        z ^= z >> np.uint64(30)
        z *= _MIX_1
        z ^= z >> np.uint64(27)
        z *= _MIX_2
        return z ^ (z >> np.uint64(31))

    @_jit
    def _fuse_hit(low, high, words, arity, width, seed_key, segment_length, segment_count):
        """The XOR of the key's slots equals its fingerprint; slots, fingerprint and packed reads
        exactly as tamis.fuse.key_slots and tamis.fuse.read_slots compute them (all in uint64)."""
        r = np.uint64(width)
        mask = (np.uint64(1) << r) - np.uint64(1)
        length = np.uint64(segment_length)
        p = _mix64(low ^ seed_key)
        q = _mix64(high ^ seed_key)
        start = ((p >> np.uint64(32)) * np.uint64(segment_count)) >> np.uint64(32)
        combined = p & mask
        for j in range(arity):
            slot = (start + np.uint64(j)) * length + ((q >> np.uint64(16 * j)) & (length - np.uint64(1)))
            bit = slot * r
            index = bit >> np.uint64(6)
            shift = bit & np.uint64(63)
            value = words[index] >> shift
            if shift + r > np.uint64(64):  # the slot runs on into the next word
                value |= words[index + np.uint64(1)] << (np.uint64(64) - shift)
            combined ^= value & mask
        return combined == np.uint64(0)

    @_jit
    def _region_hit(row, words, low, high):
        """The answer of the region of table row `row` for a key whose xxh3-128 halves are low, high:
        the one dispatch on the region's kind."""
        kind = row[0]
        if kind == REGION_BLOOM:
            return _bloom_hit(low, high, words[row[1] :], row[2], row[3])
        if kind == REGION_FUSE:
            return _fuse_hit(low, high, words[row[1] :], row[2], row[3], np.uint64(row[4]), row[5], row[6])
        return kind == REGION_YES

    # --- the kernels the query path calls ----------------------------------------------------------

    @_jit
    def regions_of_packed(data, offsets, blob, regions):
        """regions[i] = the region of key i of the packed keys: features, trees and region, key by key."""
        d, bias, tables, shifts, roots, feature, threshold, first_child, value, boundaries, _, _ = _parts(blob)
        seen = np.zeros(256, dtype=np.int64)
        counts = np.zeros(d, dtype=np.int64)
        x = np.zeros(d, dtype=np.float32)
        for i in range(len(offsets) - 1):
            _key_counts(data, offsets[i], offsets[i + 1], tables, shifts, seen, i + 1, counts)
            _row_to_float32(counts, x)
            regions[i] = _region(_score(x, bias, roots, feature, threshold, first_child, value), boundaries)

    @_jit
    def answer_regions(regions, low, high, blob, answers):
        """answers[i] = the answer of region regions[i] for the key whose hash halves are low[i], high[i]."""
        table, words = _parts(blob)[10:]
        for i in range(len(regions)):
            at = REGION_ROW * regions[i]
            answers[i] = _region_hit(table[at : at + REGION_ROW], words, low[i], high[i])

    @_jit
    def contains_one(hashed_key, blob):
        """The answer for one key, given as its xxh3-128 digest (16 bytes, big-endian: high half
        first) followed by its bytes: features, trees, region and the region's answer in one call."""
        d, bias, tables, shifts, roots, feature, threshold, first_child, value, boundaries, table, words = _parts(blob)
        counts = np.zeros(d, dtype=np.int64)
        x = np.zeros(d, dtype=np.float32)
        _key_counts(hashed_key, 16, len(hashed_key), tables, shifts, np.zeros(256, dtype=np.int64), 1, counts)
        _row_to_float32(counts, x)
        at = REGION_ROW * _region(_score(x, bias, roots, feature, threshold, first_child, value), boundaries)
        high = low = np.uint64(0)
        for j in range(8):
            high = (high << np.uint64(8)) | np.uint64(hashed_key[j])
            low = (low << np.uint64(8)) | np.uint64(hashed_key[8 + j])
        return _region_hit(table[at : at + REGION_ROW], words, low, high)

    # --- single steps, for the step-by-step checks and the benchmark's profile ---------------------

    @_jit
    def featurize_into(data, offsets, blob, columns):
        """Fill columns (d, n) float32 with the features of the n keys packed in data and offsets."""
        d, n = columns.shape
        _, _, tables, shifts = _parts(blob)[:4]
        seen = np.zeros(256, dtype=np.int64)
        counts = np.zeros(d, dtype=np.int64)
        rows = np.zeros((_BLOCK, d), dtype=np.float32)
        for start in range(0, n, _BLOCK):
            size = min(_BLOCK, n - start)
            for j in range(size):
                i = start + j
                _key_counts(data, offsets[i], offsets[i + 1], tables, shifts, seen, i + 1, counts)
                _row_to_float32(counts, rows[j])
            for f in range(d):
                for j in range(size):
                    columns[f, start + j] = rows[j, f]

    @_jit
    def score_rows(X, blob, scores):
        """scores[i] = the integer score of feature row i of X (n, d)."""
        _, bias, _, _, roots, feature, threshold, first_child, value = _parts(blob)[:9]
        for i in range(X.shape[0]):
            scores[i] = _score(X[i], bias, roots, feature, threshold, first_child, value)
