"""Loader: open an artifact and answer membership queries, with numpy, xxhash and msgpack only.

    from tamis.loader import open_filter
    bans = open_filter("store/7/artifact.tamis")
    bans.contains("frost_wyrm_1984")            # True: maybe banned; False: surely not
    bans.contains_many(["a", b"b"])             # numpy bool array, in input order
    bans.contains_many(frame["handle"])         # a polars String or Binary column works too

A key is answered the way the build inserted it: features (`tamis.features`) -> integer score
(`tamis.trees`) -> region by the integer boundaries (`tamis.regions.region_of`) -> that region's
filter ("yes", "no", or a Bloom filter). Every check runs when the file is opened; any file that
cannot be used raises FilterLoadError, and nothing stored in it is ever executed.

`open_filter(path, on_error="maybe")` never raises for an unusable file: it logs and warns once,
and returns a degraded filter that answers True ("maybe") for every key, so a service that starts
with a damaged artifact loses the filter's savings but never wrongly turns a member away.

A "maybe" (True) is only a hint: confirm it against the authoritative set before acting on it.
"""

from __future__ import annotations

import bisect
import copy
import logging
import os
import sys
import warnings
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any, Iterable, Literal, Sequence

import numpy as np

from tamis import compiled
from tamis.artifact import ArtifactError, load_artifact
from tamis.bloom import BloomFilter, KeyHashes, hash_slices
from tamis.features import FeatureLayout, feature_layout, featurize_columns, featurize_one
from tamis.filters import FILTER_MODES
from tamis.package import HASHING, HEADER_KIND
from tamis.regions import region_of
from tamis.trees import Forest, score_columns, score_values

LOG = logging.getLogger(__name__)

# Keys answered per pass of `contains_many`, so that a batch of any size needs only a few MB of
# work arrays (the feature columns take 4 bytes x features per key: 5.8 MB here for the demo's
# 89 features), while each pass is long enough that its fixed numpy costs do not show. The answers
# do not depend on it.
LOOKUP_CHUNK_KEYS = 16_384

# The ways an opened filter answers, each its own code for the same answers: the batch path in
# numpy (the reference), the same batch path in compiled kernels (when numba is installed), and the
# single-key path in plain Python. `contains_many` takes the compiled batch path when it is there.
NUMPY_PATH, COMPILED_PATH, SINGLE_KEY_PATH = "numpy", "compiled", "single"

OnError = Literal["raise", "maybe"]
ON_ERROR_CHOICES = ("raise", "maybe")


class FilterLoadError(ArtifactError):
    """The artifact cannot be used: unreadable, corrupted, of an unknown format, or inconsistent."""


@dataclass(frozen=True, eq=False)
class RegionAnswer:
    """How one region answers: always ("yes"), never ("no"), or by its Bloom filter."""

    mode: str
    bloom: BloomFilter | None


# ---------------------------------------------------------------------------------------------------
# Keys in: a list, tuple, iterable or numpy array of str/bytes, or a polars String/Binary Series.
# ---------------------------------------------------------------------------------------------------


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


def _bytes_of(keys: Sequence[Any]) -> list[bytes]:
    """Keys as bytes (str is encoded as UTF-8); TypeError names the first key that is neither."""
    try:
        return [key if isinstance(key, bytes) else key.encode("utf-8") for key in keys]
    except AttributeError:
        bad = next(key for key in keys if not isinstance(key, (bytes, str)))
        raise TypeError(f"keys must be str or bytes, got {type(bad).__name__} {bad!r}") from None


def _packed(buffer: bytes, lengths: Iterable[int], count: int) -> PackedKeys:
    offsets = np.zeros(count + 1, dtype=np.int64)
    np.cumsum(np.fromiter(lengths, dtype=np.int64, count=count), out=offsets[1:])
    return PackedKeys(buffer, offsets)


def _pack_list(keys: list | tuple) -> PackedKeys:
    """Keys packed with one join, without a Python step per key where that is safe: a batch of
    bytes joins as it is; a batch of str joins and encodes once, and when the encoded text is as
    long as the text, every character took one byte, so the character counts are the byte lengths.
    Anything else (non-ASCII text, mixed or subclassed types) is encoded key by key."""
    kinds = set(map(type, keys))
    if kinds <= {bytes}:
        return _packed(b"".join(keys), map(len, keys), len(keys))
    if kinds == {str}:
        text = "".join(keys)
        buffer = text.encode("utf-8")
        if len(buffer) == len(text):
            return _packed(buffer, map(len, keys), len(keys))
    encoded = _bytes_of(keys)
    return _packed(b"".join(encoded), map(len, encoded), len(encoded))


def _is_polars_series(keys: Any) -> bool:
    # polars is never imported here: a caller who passes a Series has imported it already.
    polars = sys.modules.get("polars")
    return polars is not None and isinstance(keys, polars.Series)


def _pack_polars(series: Any) -> PackedKeys:
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
        keys = keys.tolist()
    elif not isinstance(keys, (list, tuple)):
        keys = list(keys)
    return _pack_list(keys)


# ---------------------------------------------------------------------------------------------------
# An opened artifact
# ---------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class MembershipFilter:
    """An opened artifact, read from `path` in container format `format` ("major.minor")."""

    path: Path
    format: str
    header: dict
    feature_spec: dict
    forest: Forest
    boundaries: tuple[int, ...]
    regions: tuple[RegionAnswer, ...]
    hash_seed: int

    degraded = False

    @property
    def info(self) -> dict:
        """A copy of the artifact's header (provenance, feature spec, forest, boundaries, regions,
        hash, measured FPR) plus "format", the container version read from the file, and
        "degraded": False."""
        return {**copy.deepcopy(self.header), "format": self.format, "degraded": False}

    # Derived once from the checked header, on first use.

    @cached_property
    def _layout(self) -> FeatureLayout:
        return feature_layout(self.feature_spec)

    @cached_property
    def _boundary_array(self) -> np.ndarray:
        return np.array(self.boundaries, dtype=np.int64)

    @cached_property
    def _answer_by_mode(self) -> np.ndarray:
        """Per region, the answer when no Bloom filter is asked: True for "yes", False otherwise."""
        return np.array([region.mode == "yes" for region in self.regions])

    @cached_property
    def _is_bloom(self) -> np.ndarray:
        return np.array([region.mode == "bloom" for region in self.regions])

    @cached_property
    def _bloom_indices(self) -> tuple[int, ...]:
        return tuple(i for i, region in enumerate(self.regions) if region.mode == "bloom")

    def contains_many(self, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        """For each key, True when it may be a member and False when it surely is not.

        Keys are str (UTF-8) or bytes, in a list, tuple, any iterable, a 1-d numpy array, or a
        polars Series of dtype String or Binary. A numpy "S" array drops trailing NUL bytes of its
        elements (numpy's rule), so pass keys that may end in NUL as a list of bytes.
        """
        return self.answer_packed(pack_batch(keys))

    def answer_packed(self, packed: PackedKeys) -> np.ndarray:
        """`contains_many` of keys already packed (`pack_batch`)."""
        answers = np.zeros(len(packed), dtype=bool)
        for start in range(0, len(packed), LOOKUP_CHUNK_KEYS):
            stop = min(start + LOOKUP_CHUNK_KEYS, len(packed))
            answers[start:stop] = self._answer_chunk(packed, start, stop)
        return answers

    def _scores(self, data: np.ndarray, offsets: np.ndarray) -> np.ndarray:
        """Integer scores of packed keys; compiled, features and trees run key by key (the same
        scores as featurize_columns then score_columns, without the feature matrix)."""
        if not compiled.in_use():
            return score_columns(self.forest, featurize_columns(data, offsets, self._layout))
        scores = np.empty(len(offsets) - 1, dtype=np.int64)
        compiled.score_packed(data, offsets, *self._layout.kernel_tables, self._layout.count,
                              *self.forest._levels.kernel_arrays, self.forest.bias, scores)
        return scores

    def warm_up(self) -> None:
        """Compile (or load from numba's cache) the kernels `contains_many` runs, on empty input of
        the types it passes them, so the first batch does not pay for it; nothing without numba."""
        if compiled.ENABLED:
            self._scores(np.zeros(0, dtype=np.uint8), np.zeros(1, dtype=np.int64))
            empty = np.zeros(0, dtype=np.uint64)
            for index in self._bloom_indices:
                self.regions[index].bloom.query_hashes(KeyHashes(empty, empty))

    def _answer_chunk(self, packed: PackedKeys, start: int, stop: int) -> np.ndarray:
        offsets = packed.offsets[start : stop + 1]
        data = packed.data[offsets[0] : offsets[-1]]
        region_index = region_of(self._scores(data, offsets - offsets[0]), self._boundary_array)
        answers = self._answer_by_mode[region_index]
        in_bloom = np.flatnonzero(self._is_bloom[region_index])
        if len(in_bloom):
            hashes = hash_slices(packed.buffer, offsets[in_bloom], offsets[in_bloom + 1], self.hash_seed)
            bloom_regions = region_index[in_bloom]
            for index in self._bloom_indices:
                picked = bloom_regions == index
                if picked.any():
                    answers[in_bloom[picked]] = self.regions[index].bloom.query_hashes(hashes.select(picked))
        return answers

    def contains(self, key: str | bytes) -> bool:
        """`contains_many` for one key, in plain Python without array set-up: the same answer."""
        (data,) = _bytes_of((key,))
        score = score_values(self.forest, featurize_one(data, self._layout))
        region = self.regions[bisect.bisect_right(self.boundaries, score)]
        if region.mode == "bloom":
            return region.bloom.contains(data)
        return region.mode == "yes"

    def __contains__(self, key: str | bytes) -> bool:
        return self.contains(key)

    def answers_through(self, path: str, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        """`contains_many` of `keys` computed through one named answer path of `answer_paths()`,
        so that a check can compare the paths; a service has no need of it."""
        if path not in answer_paths():
            raise ValueError(f"answer path {path!r} is not available here; the paths are {list(answer_paths())}")
        if path == SINGLE_KEY_PATH:
            return np.fromiter(map(self.contains, pack_batch(keys).split()), dtype=bool)
        if path == NUMPY_PATH:
            with compiled.numpy_reference():
                return self.contains_many(keys)
        return self.contains_many(keys)


def answer_paths() -> tuple[str, ...]:
    """The answer paths an opened filter has in this process: numpy and single-key always,
    compiled when numba is installed and enabled."""
    if compiled.ENABLED:
        return (NUMPY_PATH, COMPILED_PATH, SINGLE_KEY_PATH)
    return (NUMPY_PATH, SINGLE_KEY_PATH)


@dataclass(frozen=True, eq=False)
class DegradedFilter:
    """Stands in for an artifact that could not be opened: every key may be a member.

    It answers True for every key, so it never gives a false negative; `info` says why it is
    degraded. Input is checked as `MembershipFilter` checks it.
    """

    path: Path
    reason: str

    degraded = True

    @property
    def info(self) -> dict:
        return {"degraded": True, "reason": self.reason, "path": str(self.path)}

    def contains_many(self, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        return np.ones(len(pack_batch(keys)), dtype=bool)

    def contains(self, key: str | bytes) -> bool:
        _bytes_of((key,))
        return True

    def __contains__(self, key: str | bytes) -> bool:
        return self.contains(key)


# ---------------------------------------------------------------------------------------------------
# Opening: every check of the header against the sections, each failure a FilterLoadError.
# ---------------------------------------------------------------------------------------------------


def _field(path: Path, header: dict, name: str, kind: type) -> Any:
    value = header.get(name)
    if not isinstance(value, kind):
        raise FilterLoadError(f"{path}: header field {name!r} is missing or not a {kind.__name__}")
    return value


def _boundaries(path: Path, header: dict) -> tuple[int, ...]:
    listed = _field(path, header, "boundaries", list)
    if not all(type(v) is int and -(2**63) <= v < 2**63 for v in listed):
        raise FilterLoadError(f"{path}: region boundaries must be int64 integers, got {listed}")
    if any(a > b for a, b in zip(listed, listed[1:])):
        raise FilterLoadError(f"{path}: region boundaries are not ascending: {listed}")
    return tuple(listed)


def _region(path: Path, index: int, entry: Any, sections: dict, seed: int) -> RegionAnswer:
    if not isinstance(entry, dict) or entry.get("mode") not in FILTER_MODES:
        mode = entry.get("mode") if isinstance(entry, dict) else entry
        raise FilterLoadError(f"{path}: region {index} has unknown mode {mode!r} (known: {list(FILTER_MODES)})")
    if entry["mode"] != "bloom":
        return RegionAnswer(entry["mode"], None)
    name = entry.get("section")
    if not isinstance(name, str) or name not in sections:
        raise FilterLoadError(f"{path}: region {index} names section {name!r}, which the file does not hold")
    if type(entry.get("bits")) is not int or type(entry.get("hashes")) is not int:
        raise FilterLoadError(f"{path}: region {index} needs integer 'bits' and 'hashes'")
    try:
        bloom = BloomFilter.from_words(sections[name], entry["bits"], entry["hashes"], seed)
    except ValueError as error:
        raise FilterLoadError(f"{path}: region {index}: {error}") from error
    return RegionAnswer("bloom", bloom)


def _parse(path: Path, version: tuple[int, int], header: dict, sections: dict) -> MembershipFilter:
    if header.get("kind") != HEADER_KIND:
        raise FilterLoadError(f"{path}: artifact kind is {header.get('kind')!r}, not {HEADER_KIND!r}")
    hashing = _field(path, header, "hash", dict)
    if {k: hashing.get(k) for k in HASHING} != HASHING or type(hashing.get("seed")) is not int:
        raise FilterLoadError(
            f"{path}: unknown hashing scheme {hashing}; this loader knows {HASHING} with an integer seed"
        )
    seed = hashing["seed"]
    spec = _field(path, header, "feature_spec", dict)
    try:
        layout = feature_layout(spec)
        forest = Forest.from_parts(_field(path, header, "forest", dict), sections)
        if layout.count != forest.features:
            raise ValueError(f"the feature spec gives {layout.count} features, the forest reads {forest.features}")
    except ValueError as error:
        raise FilterLoadError(f"{path}: {error}") from error
    boundaries = _boundaries(path, header)
    entries = _field(path, header, "regions", list)
    if len(entries) != len(boundaries) + 1:
        raise FilterLoadError(
            f"{path}: {len(boundaries)} boundaries make {len(boundaries) + 1} regions, "
            f"the header lists {len(entries)}"
        )
    regions = tuple(_region(path, i, entry, sections, seed) for i, entry in enumerate(entries))
    opened = MembershipFilter(path, f"{version[0]}.{version[1]}", header, spec, forest, boundaries, regions, seed)
    opened.warm_up()
    return opened


def _open_checked(path: Path) -> MembershipFilter:
    """Every failure to open is a FilterLoadError: the container's own errors, the header's, and
    anything else a hostile file might still provoke, named with its type (the checks above are
    meant to leave nothing for this last line to catch)."""
    try:
        loaded = load_artifact(path)
        return _parse(path, loaded.version, loaded.header, loaded.sections)
    except FilterLoadError:
        raise
    except ArtifactError as error:
        raise FilterLoadError(str(error)) from error
    except Exception as error:
        raise FilterLoadError(f"{path}: cannot be used ({type(error).__name__}: {error})") from error


def open_filter(path: str | os.PathLike, on_error: OnError = "raise") -> MembershipFilter | DegradedFilter:
    """Open an artifact written by `tamis.package.package_artifact`.

    on_error="raise" (the default): raise FilterLoadError if the file is unusable.
    on_error="maybe": return a `DegradedFilter` instead, which answers True for every key, after
    logging the reason at ERROR level and issuing a RuntimeWarning, once, here.

    The file is read into memory once and checked there, and every answer comes from that copy:
    rewriting, truncating or replacing the file afterwards changes no answer of the opened filter.
    """
    if on_error not in ON_ERROR_CHOICES:
        raise ValueError(f"on_error must be one of {list(ON_ERROR_CHOICES)}, got {on_error!r}")
    path = Path(path)
    try:
        return _open_checked(path)
    except FilterLoadError as error:
        if on_error == "raise":
            raise
        message = (
            f"membership filter {path} is unusable, so every key now answers 'maybe' (no savings, "
            f"no false negatives): {error}"
        )
        LOG.error(message)
        warnings.warn(message, RuntimeWarning, stacklevel=2)
        return DegradedFilter(path, str(error))
