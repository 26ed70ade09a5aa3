"""The query path a service runs, as one line: key bytes -> features -> score -> region -> answer.

    key bytes --features--> float32 row --forest--> integer score --boundaries--> region i
              --region i's answer--> no | yes | its Bloom filter probed at the key's xxh3-128 hash

`QueryTables` holds what the line reads (the checked feature layout, forest, boundaries, region
answers and hash seed of an artifact). Two implementations walk it, and `query_path` is the one
place that chooses between them:

- `NumpyPath` ("numpy"), the reference. A batch runs each step over the whole batch with numpy
  (`tamis.features.featurize_columns`, `tamis.trees.score_columns`, `region_of`, then each region's
  `query_hashes`); a single key runs the same steps in plain Python (`featurize_one`,
  `score_values`, the region rule by bisection, the region's `contains`), where array set-up would
  cost more than the work.
- `CompiledPath` ("compiled", numba, the `fast` extra, `tamis.compiled`). A batch is two kernel
  calls, one for features, trees and region key by key and one for the region answers, with the
  keys' hashes computed between them (xxhash, only for keys whose region needs one); a single key
  is one kernel call. tests/test_compiled.py checks every step and answer against the reference,
  bit for bit.

Region answers: a region is a `Constant` ("yes" or "no"), a `tamis.bloom.BloomFilter` or a
`tamis.fuse.FuseFilter`. Each kind
gives the numpy path `hashed` (does it need the key's hash), `query_hashes(hashes)` (a batch) and
`contains(key)` (one key), and the compiled path one row of its region table (`_kernel_region`)
answered by one jitted function (`tamis.compiled._region_hit`). A new filter kind plugs in there.
"""

from __future__ import annotations

import bisect
import dataclasses
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from functools import cached_property
from typing import Any

import numpy as np
import xxhash

from tamis import compiled
from tamis.bloom import BloomFilter, KeyHashes, hash_slices
from tamis.fuse import FuseFilter
from tamis.fuse import seed_key as seed_key_of
from tamis.features import FeatureLayout, featurize_columns, featurize_one
from tamis.trees import Forest, score_columns, score_values

ANSWER_PATHS = ("numpy", "compiled")


def region_of(scores, boundaries) -> np.ndarray:
    """Region index of each score: i such that boundaries[i-1] <= s < boundaries[i].

    Scores below boundaries[0] go to region 0 and scores at or above boundaries[-1] to the last
    region; with no boundaries every score is in region 0.
    """
    return np.searchsorted(np.asarray(boundaries), np.asarray(scores), side="right")


@dataclass(frozen=True)
class Constant:
    """A region without a filter: "yes" (answer True: its members need no filter) or "no" (answer
    False: it holds no member)."""

    answer: bool

    hashed = False

    def query_hashes(self, hashes: KeyHashes) -> np.ndarray:
        return np.full(len(hashes), self.answer)

    def contains(self, key: bytes) -> bool:
        return self.answer


RegionAnswer = Constant | BloomFilter | FuseFilter


@dataclass(frozen=True, eq=False)
class PackedKeys:
    """A batch of keys as one bytes buffer and int64 offsets: key i is buffer[offsets[i]:offsets[i+1]]."""

    buffer: bytes
    offsets: np.ndarray

    def __len__(self) -> int:
        return len(self.offsets) - 1

    @property
    def data(self) -> np.ndarray:
        return np.frombuffer(self.buffer, dtype=np.uint8)

    def split(self) -> list[bytes]:
        """The keys one by one."""
        bounds = self.offsets.tolist()
        return [self.buffer[start:stop] for start, stop in zip(bounds, bounds[1:])]



# ---------------------------------------------------------------------------------------------------
# Keys in: a list, tuple, iterable or numpy array of str/bytes, or a polars String/Binary Series.
# ---------------------------------------------------------------------------------------------------


def key_bytes(key: str | bytes) -> bytes:
    """One key as bytes (str is encoded as UTF-8); TypeError for anything else."""
    if isinstance(key, bytes):
        return key
    if isinstance(key, str):
        return key.encode("utf-8")
    raise TypeError(f"keys must be str or bytes, got {type(key).__name__} {key!r}")


def _offsets(lengths, count: int) -> np.ndarray:
    offsets = np.zeros(count + 1, dtype=np.int64)
    np.cumsum(np.fromiter(lengths, dtype=np.int64, count=count), out=offsets[1:])
    return offsets


def _pack_list(keys: list | tuple) -> PackedKeys:
    """Keys packed with one join, without a Python step per key where that is safe: a batch of
    bytes joins as it is; a batch of str joins and encodes once, and the byte offsets follow from
    the character counts (when the text is ASCII they are the same; otherwise character c starts at
    the c-th byte that is not a UTF-8 continuation byte, 10xxxxxx). Anything else (mixed or
    subclassed types) is encoded key by key."""
    kinds = set(map(type, keys))
    if kinds <= {bytes}:
        return PackedKeys(b"".join(keys), _offsets(map(len, keys), len(keys)))
    if kinds == {str}:
        text = "".join(keys)
        buffer = text.encode("utf-8")
        offsets = _offsets(map(len, keys), len(keys))
        if len(buffer) != len(text):
            starts = np.flatnonzero((np.frombuffer(buffer, dtype=np.uint8) & 0xC0) != 0x80)
            offsets = np.append(starts, len(buffer))[offsets]
        return PackedKeys(buffer, offsets)
    encoded = [key_bytes(key) for key in keys]
    return PackedKeys(b"".join(encoded), _offsets(map(len, encoded), len(encoded)))


def _is_polars_series(keys) -> bool:
    # polars is never imported here: a caller who passes a Series has imported it already.
    polars = sys.modules.get("polars")
    return polars is not None and isinstance(keys, polars.Series)


def _pack_polars(series) -> PackedKeys:
    """A polars String or Binary Series packed from polars' own buffers: its byte lengths and its
    values joined into one buffer, with no Python object per key."""
    polars = sys.modules["polars"]  # imported by the caller (see _is_polars_series)
    dtype = series.dtype
    if series.null_count():
        first = int(series.is_null().arg_max())
        raise TypeError(f"keys must be str or bytes, got a null at position {first} of the polars Series")
    if dtype == polars.String:
        lengths = series.str.len_bytes()
        buffer = series.str.join("").item().encode("utf-8") if len(series) else b""
    elif dtype == polars.Binary:
        lengths = series.bin.size()
        buffer = b"".join(series.to_list())  # polars offers no join of binary values
    else:
        raise TypeError(f"a polars Series of keys must have dtype String or Binary, got {dtype}")
    offsets = np.zeros(len(series) + 1, dtype=np.int64)
    np.cumsum(lengths.cast(polars.Int64).to_numpy(), out=offsets[1:])
    return PackedKeys(buffer, offsets)


# Every form of a batch of keys that `contains_many` answers (tests/test_loader.py asks members
# ending in NUL, non-ASCII and of the longest allowed length through each): a list or tuple of str
# (UTF-8) or bytes, any other iterable of them, a 1-d numpy array of dtype object holding them, a
# 1-d numpy array of dtype "S" or "U" whose elements all fill its width, and a polars Series of
# dtype String or Binary.
KEY_BATCH_FORMS = ("list", "tuple", "iterable", "numpy object", "numpy S", "numpy U", "polars String", "polars Binary")


def _pack_fixed_width(keys: np.ndarray) -> PackedKeys:
    """A numpy "S" or "U" array, packed from its own buffer when every element fills the width.

    numpy pads a shorter element with NUL and drops trailing NULs when it reads one, so b"tok" and
    b"tok\x00" are the same element of an "S4" array: only an element as long as the width is known
    whole. Any shorter element is refused (TypeError) rather than guessed, since a guess could
    answer a member ending in NUL "no"."""
    width = keys.dtype.itemsize // (4 if keys.dtype.kind == "U" else 1)
    lengths = np.char.str_len(keys) if len(keys) else np.zeros(0, dtype=np.int64)
    short = np.flatnonzero(lengths != width)
    if len(short):
        at = int(short[0])
        raise TypeError(
            f"a numpy {keys.dtype} array cannot say whether its keys end in NUL: numpy pads shorter elements with NUL "
            f"and drops trailing NULs, so element {at} ({keys[at]!r}, {int(lengths[at])} of {width} places) may stand for "
            f"several keys; pass a list, or np.array(keys, dtype=object), or a polars Series"
        )
    if keys.dtype.kind == "S":
        buffer = np.ascontiguousarray(keys).tobytes()
        return PackedKeys(buffer, np.arange(len(keys) + 1, dtype=np.int64) * width)
    text = np.ascontiguousarray(keys, dtype=f"<U{width}").tobytes().decode("utf-32-le")
    return _pack_list([text[i * width : (i + 1) * width] for i in range(len(keys))])


def pack_batch(keys: Iterable[str | bytes] | np.ndarray | Any) -> PackedKeys:
    """Any batch that `contains_many` takes, packed; TypeError for anything else."""
    if isinstance(keys, (str, bytes)):
        raise TypeError("contains_many takes a sequence of keys; use contains for a single key")
    if _is_polars_series(keys):
        return _pack_polars(keys)
    if isinstance(keys, np.ndarray):
        if keys.ndim != 1 or keys.dtype.kind not in "SUO":
            raise TypeError(
                f"a numpy batch of keys must be a 1-d array of str or bytes, got {keys.dtype} of shape {keys.shape}"
            )
        if keys.dtype.kind in "SU":
            return _pack_fixed_width(keys)
        keys = keys.tolist()
    elif not isinstance(keys, (list, tuple)):
        keys = list(keys)
    return _pack_list(keys)


def hashes_where(packed: PackedKeys, needed: np.ndarray, seed: int) -> KeyHashes:
    """xxh3-128 halves of the keys where `needed` (bool, one per key) is true, zero elsewhere (the
    regions of those keys never read them): a key is hashed only when its region needs it."""
    low = np.zeros(len(packed), dtype=np.uint64)
    high = np.zeros(len(packed), dtype=np.uint64)
    which = np.flatnonzero(needed)
    if len(which):
        hashes = hash_slices(packed.buffer, packed.offsets[which], packed.offsets[which + 1], seed)
        low[which], high[which] = hashes.low, hashes.high
    return KeyHashes(low, high)


@dataclass(frozen=True, eq=False)
class QueryTables:
    """What the query path reads of an artifact, checked: features, forest, boundaries, regions, seed."""

    layout: FeatureLayout
    forest: Forest
    boundaries: tuple[int, ...]
    regions: tuple[RegionAnswer, ...]
    seed: int

    @cached_property
    def boundary_array(self) -> np.ndarray:
        return np.array(self.boundaries, dtype=np.int64)

    @cached_property
    def hashed(self) -> np.ndarray:
        """Per region, whether its answer needs the key's hash."""
        return np.array([region.hashed for region in self.regions])

    @cached_property
    def kernel_tables(self) -> np.ndarray:
        """Everything the compiled path's kernels read, as one array (see `tamis.compiled`); it
        holds its own copy of the filter words (see `sharing_kernel_words`)."""
        return _kernel_tables(self)

    @cached_property
    def sharing_kernel_words(self) -> QueryTables:
        """These tables with every filter's words read from `kernel_tables`, so that the words are
        held once: a filter that answers on the compiled path keeps these, and the file's bytes the
        regions were read from can go. Both paths answer from them alike."""
        blob = _kernel_tables(self)
        words, first, regions = compiled.table_part(blob, "words"), 0, []
        for region in self.regions:
            count = len(_kernel_region(region)[1])
            if count:
                view = words[first : first + count]
                view.flags.writeable = False
                region = dataclasses.replace(region, words=view)
            regions.append(region)
            first += count
        shared = QueryTables(self.layout, self.forest, self.boundaries, tuple(regions), self.seed)
        shared.__dict__.update(kernel_tables=blob, sharing_kernel_words=shared)  # the cached properties' slots
        return shared


# ---------------------------------------------------------------------------------------------------
# The reference: numpy for a batch, plain Python for one key
# ---------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class NumpyPath:
    tables: QueryTables

    name = "numpy"

    def warm_up(self) -> None:
        """Nothing to prepare."""

    def regions(self, packed: PackedKeys) -> np.ndarray:
        t = self.tables
        return region_of(score_columns(t.forest, featurize_columns(packed.data, packed.offsets, t.layout)), t.boundary_array)

    def answer_packed(self, packed: PackedKeys) -> np.ndarray:
        t = self.tables
        regions = self.regions(packed)
        hashes = hashes_where(packed, t.hashed[regions], t.seed)
        answers = np.empty(len(packed), dtype=bool)
        for index, region in enumerate(t.regions):
            here = regions == index
            answers[here] = region.query_hashes(hashes.select(here))
        return answers

    def contains(self, key: bytes) -> bool:
        t = self.tables
        score = score_values(t.forest, featurize_one(key, t.layout))
        return t.regions[bisect.bisect_right(t.boundaries, score)].contains(key)


# ---------------------------------------------------------------------------------------------------
# The compiled path (numba)
# ---------------------------------------------------------------------------------------------------

_NO_WORDS = np.zeros(0, dtype=np.uint64)


def _kernel_region(region: RegionAnswer) -> tuple[list[int], np.ndarray]:
    """(kind, p0, ...) and the words of one region, for a row of the compiled path's region table
    (`tamis.compiled.REGION_ROW` entries with the first word; the unused ones are 0)."""
    if isinstance(region, BloomFilter):
        return [compiled.REGION_BLOOM, region.bits, region.hashes], region.words
    if isinstance(region, FuseFilter):
        seed_key = int(np.uint64(seed_key_of(region.seed)).view(np.int64))  # its 64 bits, as the int64 table holds them
        return [compiled.REGION_FUSE, region.arity, region.width, seed_key, region.segment_length,
                region.segment_count], region.words
    return [compiled.REGION_YES if region.answer else compiled.REGION_NO], _NO_WORDS


def _kernel_tables(t: QueryTables) -> np.ndarray:
    rows, words, first_word = [], [], 0
    for region in t.regions:
        (kind, *params), region_words = _kernel_region(region)
        rows.append([kind, first_word, *params] + [0] * (compiled.REGION_ROW - 2 - len(params)))
        words.append(region_words)
        first_word += len(region_words)
    levels = t.forest._levels
    class_of, fold, is_vowel, shifts = t.layout.kernel_tables
    parts = {
        "tables": np.concatenate([class_of, fold, is_vowel]),
        "shifts": shifts,
        "roots": levels.roots,
        "feature": levels.feature,
        "threshold": levels.threshold,
        "first_child": levels.first_child,
        "value": levels.value,
        "boundaries": t.boundary_array,
        "regions": np.array(rows, dtype=np.int64),
        "words": np.concatenate([_NO_WORDS, *words]),
    }
    return compiled.query_tables(t.layout.count, t.forest.bias, parts)


@dataclass(frozen=True, eq=False)
class CompiledPath:
    tables: QueryTables

    name = "compiled"

    @property
    def blob(self) -> np.ndarray:
        return self.tables.kernel_tables

    def warm_up(self) -> None:
        """Compile (or load from numba's cache) the kernels, on empty input of the types the calls
        pass, so the first query does not pay for it."""
        empty = PackedKeys(b"", np.zeros(1, dtype=np.int64))
        self.answer_packed(empty)
        compiled.answer_regions(np.zeros(0, dtype=np.int64), _NO_WORDS, _NO_WORDS, self.blob, np.zeros(0, dtype=bool))
        compiled.contains_one(bytes(16), self.blob)

    def regions(self, packed: PackedKeys) -> np.ndarray:
        regions = np.empty(len(packed), dtype=np.int64)
        compiled.regions_of_packed(packed.data, packed.offsets, self.blob, regions)
        return regions

    def answer_packed(self, packed: PackedKeys) -> np.ndarray:
        regions = self.regions(packed)
        hashes = hashes_where(packed, self.tables.hashed[regions], self.tables.seed)
        answers = np.empty(len(packed), dtype=bool)
        compiled.answer_regions(regions, hashes.low, hashes.high, self.blob, answers)
        return answers

    def contains(self, key: bytes) -> bool:
        return compiled.contains_one(xxhash.xxh3_128_digest(key, self.tables.seed) + key, self.blob)


def available_paths() -> tuple[str, ...]:
    """The answer paths this process can run: "numpy" always, "compiled" when numba is enabled."""
    return ANSWER_PATHS if compiled.ENABLED else ANSWER_PATHS[:1]


def default_path() -> str:
    """The path a filter answers on unless told otherwise: compiled when numba is installed and
    enabled (`tamis.compiled.ENABLED`), the numpy reference otherwise."""
    return available_paths()[-1]


def check_path(name: str) -> None:
    """ValueError unless this process can run the answer path `name`."""
    if name not in available_paths():
        raise ValueError(
            f"answer path {name!r} is not available here (available: {list(available_paths())}; "
            f"the compiled path needs numba, pip install 'tamis[fast]', and {compiled.NUMPY_ONLY_VARIABLE} unset)"
        )


def query_path(tables: QueryTables, name: str) -> NumpyPath | CompiledPath:
    """The one switch between the two implementations of the query path."""
    check_path(name)
    return CompiledPath(tables.sharing_kernel_words) if name == "compiled" else NumpyPath(tables)
