"""Loader: open an artifact and answer membership queries, with numpy, xxhash and msgpack only.

    from pipeline.loader import open_filter
    bans = open_filter("store/7/artifact.tamis")
    bans.contains("frost_wyrm_1984")            # True: maybe banned; False: surely not
    bans.contains_many(["a", b"b"])             # numpy bool array, in input order

A key is answered the way the build inserted it: features (`pipeline.features`) -> integer score
(`pipeline.trees`) -> region by the integer boundaries (`pipeline.regions.region_of`) -> that region's
filter ("yes", "no", or a Bloom filter). Every check runs when the file is opened; any file that
cannot be used raises FilterLoadError, and nothing stored in it is ever executed.

A "maybe" (True) is only a hint: confirm it against the authoritative set before acting on it.
"""

from __future__ import annotations

import bisect
import copy
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np

from pipeline.artifact import ArtifactError, load_artifact
from pipeline.bloom import BloomFilter, hash_keys
from pipeline.features import check_feature_spec, feature_count, featurize
from pipeline.filters import FILTER_MODES
from pipeline.package import HASHING, HEADER_KIND
from pipeline.regions import region_of
from pipeline.trees import Forest, score_batch, score_row


class FilterLoadError(ArtifactError):
    """The artifact cannot be used: unreadable, corrupted, of an unknown format, or inconsistent."""


@dataclass(frozen=True, eq=False)
class RegionAnswer:
    """How one region answers: always ("yes"), never ("no"), or by its Bloom filter."""

    mode: str
    bloom: BloomFilter | None


def _bytes_of(keys: Sequence[Any]) -> list[bytes]:
    """Keys as bytes (str is encoded as UTF-8); TypeError names the first key that is neither."""
    try:
        return [key if isinstance(key, bytes) else key.encode("utf-8") for key in keys]
    except AttributeError:
        bad = next(key for key in keys if not isinstance(key, (bytes, str)))
        raise TypeError(f"keys must be str or bytes, got {type(bad).__name__} {bad!r}") from None


def _key_list(keys: Iterable[str | bytes] | np.ndarray) -> list[bytes]:
    """A batch of keys as a list of bytes: any iterable of str/bytes, or a 1-d numpy array of them."""
    if isinstance(keys, (str, bytes)):
        raise TypeError("contains_many takes a sequence of keys; use contains for a single key")
    if isinstance(keys, np.ndarray):
        if keys.ndim != 1 or keys.dtype.kind not in "SUO":
            raise TypeError(
                f"a numpy batch of keys must be a 1-d array of str or bytes, got {keys.dtype} of shape {keys.shape}"
            )
        keys = keys.tolist()
    elif not isinstance(keys, (list, tuple)):
        keys = list(keys)
    return _bytes_of(keys)


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

    @property
    def info(self) -> dict:
        """A copy of the artifact's header (provenance, feature spec, forest, boundaries, regions,
        hash, measured FPR) plus "format", the container version read from the file."""
        return {**copy.deepcopy(self.header), "format": self.format}

    def contains_many(self, keys: Iterable[str | bytes] | np.ndarray) -> np.ndarray:
        """For each key, True when it may be a member and False when it surely is not.

        Keys are str (UTF-8) or bytes. A numpy "S" array drops trailing NUL bytes of its elements
        (numpy's rule), so pass keys that may end in NUL as a list of bytes.
        """
        batch = _key_list(keys)
        answers = np.zeros(len(batch), dtype=bool)
        if not batch:
            return answers
        scores = score_batch(self.forest, featurize(batch, self.feature_spec))
        region_index = region_of(scores, np.array(self.boundaries, dtype=np.int64))
        hashes = hash_keys(batch, self.hash_seed) if any(r.mode == "bloom" for r in self.regions) else None
        for index, region in enumerate(self.regions):
            if region.mode == "no":
                continue
            mask = region_index == index
            if region.mode == "yes":
                answers[mask] = True
            elif mask.any():
                answers[mask] = region.bloom.query_hashes(hashes.select(mask))
        return answers

    def contains(self, key: str | bytes) -> bool:
        """`contains_many` for one key, without batch set-up: the same answer."""
        (data,) = _bytes_of((key,))
        score = score_row(self.forest, featurize([data], self.feature_spec)[0])
        region = self.regions[bisect.bisect_right(self.boundaries, score)]
        if region.mode == "bloom":
            return region.bloom.contains(data)
        return region.mode == "yes"

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
    if name not in sections:
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
        check_feature_spec(spec)
        forest = Forest.from_parts(_field(path, header, "forest", dict), sections)
        if feature_count(spec) != forest.features:
            raise ValueError(
                f"the feature spec gives {feature_count(spec)} features, the forest reads {forest.features}"
            )
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
    return MembershipFilter(path, f"{version[0]}.{version[1]}", header, spec, forest, boundaries, regions, seed)


def open_filter(path: str | os.PathLike) -> MembershipFilter:
    """Open an artifact written by `pipeline.package.package_artifact`; raise FilterLoadError if unusable.

    The bit arrays and forest arrays stay mapped from the file (read-only, not copied), so the file
    must not be rewritten in place while open; replacing it by rename, as publishing does, is safe.
    """
    path = Path(path)
    try:
        loaded = load_artifact(path)
    except ArtifactError as error:
        raise FilterLoadError(str(error)) from error
    return _parse(path, loaded.version, loaded.header, loaded.sections)
