"""Loader: open an artifact and answer membership queries, with numpy, xxhash and msgpack only.

    from tamis.loader import open_filter
    bans = open_filter("store/7/artifact.tamis")
    bans.contains("frost_wyrm_1984")            # True: maybe banned; False: surely not
    bans.contains_many(["a", b"b"])             # numpy bool array, in input order
    bans.contains_many(frame["handle"])         # a polars String or Binary column works too

A key is answered the way the build inserted it, by the query path (`tamis.query`): features ->
integer score -> region by the integer boundaries -> that region's answer ("yes", "no", its Bloom
filter or its binary fuse filter), on the numpy reference or the compiled path (`answer_path`, `using`).
By default a filter answers on the fastest path here that its build verified (the header's
`verified_paths`): the compiled path when numba is installed and the build checked every member
through it, else the numpy reference, saying so in a warning when it falls back. Every check
runs when the file is opened; any file that cannot be used raises FilterLoadError, and nothing
stored in it is ever executed.

`open_filter(path, on_error="maybe")` never raises for an unusable file: it logs and warns once,
and returns a degraded filter that answers True ("maybe") for every key, so a service that starts
with a damaged artifact loses the filter's savings but never wrongly turns a member away.

Given a store folder, `open_filter(store)` serves the version in service (`tamis.store`) as a
`ServedFilter`, which answers like the filters above and swaps to a newly published version when
asked (`refresh()`) or every `refresh_seconds`:

    with open_filter("/srv/tamis/store", refresh_seconds=60) as bans:
        bans.contains(handle); bans.version; bans.fpr

A served store also answers "maybe" for every key added to it (`tamis add`, `tamis.additions`)
after the version in service was built; a refresh reads new batches without reopening the artifact.

A served store can record its traffic (`tamis.traffic`): `open_filter(store, sample_folder=F)`
writes a lookup sample into F for the nightly build, and `confirm(key, member)` after each check of
a "maybe" feeds `observed()`, the false-positive rate the service really gets, with a warning when
it rises above the certified bound.

A "maybe" (True) is only a hint: confirm it against the authoritative set before acting on it.
"""

from __future__ import annotations

import copy
import dataclasses
import logging
import os
import threading
import warnings
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any, Iterable, Literal

import numpy as np

from tamis import store
from tamis.additions import NO_PENDING, BatchError, PendingKeys, folded_through
from tamis.artifact import ArtifactError, check_artifact, load_artifact
from tamis.bloom import BloomFilter
from tamis.features import feature_layout
from tamis.format import HASHING, HEADER_KIND, REGION_MODES_OF_MAJOR, VERIFIED_PATHS_FIELD
from tamis.fuse import FuseFilter
from tamis.query import (
    ANSWER_PATHS,
    CompiledPath,
    Constant,
    NumpyPath,
    PackedKeys,
    QueryTables,
    RegionAnswer,
    available_paths,
    check_path,
    default_path,
    key_bytes,
    pack_batch,
    query_path,
)
from tamis.traffic import DEFAULT_SAMPLE_RATE, Served, TrafficRecorder
from tamis.trees import Forest

LOG = logging.getLogger(__name__)

# Keys answered per pass of `contains_many`, so that a batch of any size needs only a few MB of
# work arrays (the numpy path's feature columns take 4 bytes x features per key: 5.8 MB here for
# the demo's 89 features), while each pass is long enough that its fixed costs do not show. The
# answers do not depend on it.
LOOKUP_CHUNK_KEYS = 16_384

# A single-key answer path is named after its query path with this suffix ("numpy-single").
SINGLE_KEY_SUFFIX = "-single"

OnError = Literal["raise", "maybe"]
ON_ERROR_CHOICES = ("raise", "maybe")


class FilterLoadError(ArtifactError):
    """The artifact cannot be used: unreadable, corrupted, of an unknown format, or inconsistent."""


class AdditionsLoadError(FilterLoadError):
    """A batch of the store's additions cannot be trusted, so the keys added are not all known."""


# ---------------------------------------------------------------------------------------------------
# An opened artifact
# ---------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class MembershipFilter:
    """An opened artifact, read from `path` in container format `format` ("major.minor"), answering
    on `answer_path` ("numpy" or "compiled", `tamis.query`; see `serving_path`)."""

    path: Path
    format: str
    header: dict
    tables: QueryTables
    answer_path: str

    degraded = False

    @property
    def info(self) -> dict:
        """A copy of the artifact's header (provenance, feature spec, forest, boundaries, regions,
        hash, measured FPR) plus "format", the container version read from the file, and
        "degraded": False."""
        return {**copy.deepcopy(self.header), "format": self.format, "degraded": False}

    @property
    def verified_paths(self) -> tuple[str, ...]:
        """The query paths the build's verification answered every member through (none for an
        artifact not yet verified or written before format 2.2)."""
        return tuple(self.header.get(VERIFIED_PATHS_FIELD, ()))

    @property
    def forest(self) -> Forest:
        return self.tables.forest

    @property
    def feature_spec(self) -> dict:
        return self.tables.layout.spec

    @property
    def boundaries(self) -> tuple[int, ...]:
        return self.tables.boundaries

    @property
    def regions(self) -> tuple[RegionAnswer, ...]:
        return self.tables.regions

    @property
    def hash_seed(self) -> int:
        return self.tables.seed

    # The figures the build measured, read from the header (None when it holds none).

    @property
    def fpr(self) -> float | None:
        """The held-out false-positive rate measured at build time."""
        return _figure(self.header.get("measured"), "fpr")

    @property
    def fpr_upper(self) -> float | None:
        """Its one-sided upper confidence bound."""
        return _figure(self.header.get("measured"), "fpr_upper")

    @property
    def target(self) -> float | None:
        """The false-positive rate the build was asked to meet."""
        return _figure(self.header.get("measured"), "target_fpr")

    @property
    def built_at(self) -> str | None:
        """When the build ran (UTC, ISO 8601)."""
        provenance = self.header.get("provenance")
        built = provenance.get("built_at") if isinstance(provenance, dict) else None
        return built if isinstance(built, str) else None

    def __repr__(self) -> str:
        measured = "not measured" if self.fpr is None else f"fpr {self.fpr:.2%}"
        return (
            f"MembershipFilter({str(self.path)!r}, format {self.format}, {self.forest.trees} trees, "
            f"{len(self.regions)} regions, {measured}, built {self.built_at})"
        )

    @cached_property
    def _path(self) -> NumpyPath | CompiledPath:
        return query_path(self.tables, self.answer_path)

    def using(self, answer_path: str) -> MembershipFilter:
        """This filter answering on `answer_path` ("numpy", the reference, or "compiled", which
        needs numba); both give the same answers. ValueError for a path this process cannot run.
        A path the build did not verify (`verified_paths`) answers only when named like this."""
        on_path = query_path(self.tables, answer_path)
        chosen = dataclasses.replace(self, answer_path=answer_path, tables=on_path.tables)  # the tables it reads
        chosen.__dict__["_path"] = on_path
        on_path.warm_up()
        return chosen

    def contains_many(self, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        """For each key, True when it may be a member and False when it surely is not.

        Keys are str (UTF-8) or bytes, in any form of `tamis.query.KEY_BATCH_FORMS`: a list, tuple
        or other iterable, a 1-d numpy array (dtype object; or "S"/"U" when every element fills the
        width, since numpy drops an element's trailing NULs: a TypeError says so otherwise), or a
        polars Series of dtype String or Binary.
        """
        return self.answer_packed(pack_batch(keys))

    def answer_packed(self, packed: PackedKeys) -> np.ndarray:
        """`contains_many` of keys already packed (`tamis.query.pack_batch`), a chunk at a time."""
        answers = np.empty(len(packed), dtype=bool)
        answer = self._path.answer_packed
        for start in range(0, len(packed), LOOKUP_CHUNK_KEYS):
            stop = min(start + LOOKUP_CHUNK_KEYS, len(packed))
            offsets = packed.offsets[start : stop + 1]
            chunk = PackedKeys(packed.buffer[offsets[0] : offsets[-1]], offsets - offsets[0])
            answers[start:stop] = answer(chunk)
        return answers

    def contains(self, key: str | bytes) -> bool:
        """`contains_many` for one key, without array set-up: the same answer."""
        if type(key) is not bytes:
            key = key_bytes(key)
        return self._path.contains(key)

    def __contains__(self, key: str | bytes) -> bool:
        return self.contains(key)

    def answers_through(self, path: str, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        """`contains_many` of `keys` computed through one named answer path of `answer_paths()`
        (a query path's batch call, or its single-key call key by key), so that a check can
        compare the paths; a service has no need of it."""
        if path not in answer_paths():
            raise ValueError(f"answer path {path!r} is not available here; the paths are {list(answer_paths())}")
        query_path_name = path.removesuffix(SINGLE_KEY_SUFFIX)
        on_path = self if query_path_name == self.answer_path else self.using(query_path_name)
        if path.endswith(SINGLE_KEY_SUFFIX):
            return np.fromiter(map(on_path.contains, pack_batch(keys).split()), dtype=bool)
        return on_path.contains_many(keys)


def answer_paths() -> tuple[str, ...]:
    """The answer paths an opened filter has in this process: the batch call and the single-key
    call of each query path (`tamis.query.available_paths`: numpy always, compiled when numba is
    installed and enabled)."""
    paths = available_paths()
    return (*paths, *(name + SINGLE_KEY_SUFFIX for name in paths))


def serving_path(verified: tuple[str, ...]) -> str:
    """The path a filter answers on unless told otherwise: the last of `available_paths()` (the
    compiled path when numba is installed and enabled) that its build verified, else the numpy
    reference, which every build verifies."""
    usable = [name for name in available_paths() if name in verified]
    return usable[-1] if usable else ANSWER_PATHS[0]


def _verified_paths(path: Path, header: dict) -> tuple[str, ...]:
    listed = header.get(VERIFIED_PATHS_FIELD, [])
    if not isinstance(listed, list) or not all(isinstance(name, str) and name in ANSWER_PATHS for name in listed):
        raise FilterLoadError(f"{path}: header field {VERIFIED_PATHS_FIELD!r} must list answer paths of "
                              f"{list(ANSWER_PATHS)}, got {listed!r}")
    return tuple(listed)


def _chosen_path(path: Path, header: dict, answer_path: str | None) -> str:
    """`answer_path` when given, else `serving_path` of the build's verified paths, with a warning
    when that is not the fastest path this process has."""
    verified = _verified_paths(path, header)
    if answer_path is not None:
        return answer_path
    chosen = serving_path(verified)
    if chosen != default_path():
        LOG.warning(f"{path}: answering on the {chosen} path, not the {default_path()} path, which its build did not "
                    f"verify (verified: {', '.join(verified) or 'none'}); a build where numba is installed (pip "
                    f"install 'tamis[fast]') verifies both, or pass answer_path to choose")
    return chosen


def _figure(measured: Any, name: str) -> float | None:
    value = measured.get(name) if isinstance(measured, dict) else None
    return float(value) if isinstance(value, (int, float)) and not isinstance(value, bool) else None


@dataclass(frozen=True, eq=False)
class DegradedFilter:
    """Stands in for an artifact that could not be opened: every key may be a member.

    It answers True for every key, so it never gives a false negative; `info` says why it is
    degraded. Input is checked as `MembershipFilter` checks it. Nothing was measured, so its
    figures (`fpr`, `fpr_upper`, `target`, `built_at`) are None.
    """

    path: Path
    reason: str

    degraded = True
    fpr = fpr_upper = target = built_at = None
    verified_paths = ()

    def __repr__(self) -> str:
        reason = " ".join(self.reason.split())
        return f"DegradedFilter({str(self.path)!r}, answers maybe to every key: {reason:.160})"

    @property
    def info(self) -> dict:
        return {"degraded": True, "reason": self.reason, "path": str(self.path)}

    def contains_many(self, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        return self.answer_packed(pack_batch(keys))

    def answer_packed(self, packed: PackedKeys) -> np.ndarray:
        return np.ones(len(packed), dtype=bool)

    def contains(self, key: str | bytes) -> bool:
        key_bytes(key)
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


def _region(path: Path, index: int, entry: Any, sections: dict, seed: int, major: int) -> RegionAnswer:
    modes = REGION_MODES_OF_MAJOR[major]
    if not isinstance(entry, dict) or entry.get("mode") not in modes:
        mode = entry.get("mode") if isinstance(entry, dict) else entry
        raise FilterLoadError(f"{path}: region {index} has unknown mode {mode!r} (format {major}.x knows: {list(modes)})")
    mode = entry["mode"]
    if mode in ("yes", "no"):
        return Constant(mode == "yes")
    name = entry.get("section")
    if not isinstance(name, str) or name not in sections:
        raise FilterLoadError(f"{path}: region {index} names section {name!r}, which the file does not hold")
    fields = ("bits", "hashes") if mode == "bloom" else ("hashes", "width", "seed", "segment_length", "segment_count")
    if any(type(entry.get(field)) is not int for field in fields):
        raise FilterLoadError(f"{path}: region {index} in mode {mode!r} needs integer {', '.join(map(repr, fields))}")
    try:
        if mode == "bloom":
            return BloomFilter.from_words(sections[name], entry["bits"], entry["hashes"], seed)
        return FuseFilter.from_words(sections[name], entry["hashes"], entry["width"], entry["seed"],
                                     entry["segment_length"], entry["segment_count"], seed)
    except ValueError as error:
        raise FilterLoadError(f"{path}: region {index}: {error}") from error


def _parse(path: Path, version: tuple[int, int], header: dict, sections: dict, answer_path: str | None) -> MembershipFilter:
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
    regions = tuple(_region(path, i, entry, sections, seed, version[0]) for i, entry in enumerate(entries))
    tables = QueryTables(layout, forest, boundaries, regions, seed)
    chosen = _chosen_path(path, header, answer_path)
    return MembershipFilter(path, f"{version[0]}.{version[1]}", header, tables, chosen).using(chosen)


def _open_checked(path: Path, answer_path: str | None, data: bytes | None = None) -> MembershipFilter:
    """The artifact at `path` (its bytes `data` when already read), checked, parsed and answering
    on `answer_path` (None: `serving_path`).

    Every failure to open is a FilterLoadError: the container's own errors, the header's, and
    anything else a hostile file might still provoke, named with its type (the checks above are
    meant to leave nothing for this last line to catch)."""
    try:
        loaded = load_artifact(path) if data is None else check_artifact(path, data)
        return _parse(path, loaded.version, loaded.header, loaded.sections, answer_path)
    except FilterLoadError:
        raise
    except ArtifactError as error:
        raise FilterLoadError(str(error)) from error
    except Exception as error:
        raise FilterLoadError(f"{path}: cannot be used ({type(error).__name__}: {error})") from error


def _degraded(path: Path, error: FilterLoadError) -> DegradedFilter:
    """The stand-in for an unusable artifact, after logging and warning why, once."""
    message = (
        f"membership filter {path} is unusable, so every key now answers 'maybe' (no savings, "
        f"no false negatives): {error}"
    )
    LOG.error(message)
    warnings.warn(message, RuntimeWarning, stacklevel=3)
    return DegradedFilter(path, str(error))


# ---------------------------------------------------------------------------------------------------
# A store's version in service, kept current
# ---------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class InService:
    """One version of a store as served: its number (None when none could be opened), its filter,
    the identity of its artifact file (device, inode, size, modification time: a store wiped and
    rebuilt reuses version numbers, never all four), how far its build read the store's additions
    and the keys added after that."""

    version: int | None
    filter: MembershipFilter | DegradedFilter
    identity: tuple | None = None
    through: int = 0
    pending: PendingKeys = NO_PENDING

    @cached_property
    def served(self) -> Served:
        """The build this version is, and what it certified, as the traffic recorder files it."""
        provenance = self.filter.info.get("provenance", {}) if not self.filter.degraded else {}
        return Served(build_id=provenance.get("build_id"), version=self.version, fpr=self.filter.fpr,
                      fpr_upper=self.filter.fpr_upper, target=self.filter.target)


def _file_identity(path: Path) -> tuple:
    status = os.stat(path)
    return (status.st_dev, status.st_ino, status.st_size, status.st_mtime_ns)


def _pending_after(folder: Path, pending: PendingKeys, through: int) -> PendingKeys:
    try:
        return pending.after(folder, through)
    except BatchError as error:
        raise AdditionsLoadError(f"{error}; remove or restore the file (every service answers 'maybe' to all keys "
                                 f"while it stays, under on_error='maybe')") from error


def open_in_service(folder: Path, answer_path: str | None) -> InService:
    """The version in service of the store `folder`, read as one (`tamis.store.read_in_service`),
    with the keys added after its build; FilterLoadError when there is none or it cannot be used."""
    try:
        version, path, data = store.read_in_service(folder)
        identity = _file_identity(path)
    except (store.StoreError, OSError) as error:
        raise FilterLoadError(f"{folder}: {error}" if isinstance(error, OSError) else str(error)) from error
    opened = _open_checked(path, answer_path, data)
    through = folded_through(opened.header)
    return InService(version, opened, identity, through, _pending_after(folder, NO_PENDING, through))


class ServedFilter:
    """The version in service of a store, answering like `MembershipFilter`, kept current.

    `refresh()` swaps to the version now in service when it differs from the one served (another
    version number, or another artifact file under the same number: a store wiped and rebuilt),
    and otherwise reads the batches added since (`tamis.additions`); with `refresh_seconds`, a
    background thread calls it at that interval. Every key added after the served version was
    built answers True on every path. A batch that cannot be trusted is an AdditionsLoadError; under
    on_error="maybe" the filter then answers True for every key until it can read them all again. The version served and its
    filter are one object replaced by one assignment, and every query reads it once, so queries from
    any number of threads run on during a swap and each is answered wholly by one version. A new
    version that cannot be opened is not swapped in: `refresh()` raises FilterLoadError under
    on_error="raise" and logs under "maybe", and the version served stays. `close()` (or leaving a
    `with` block) stops the thread; a closed filter answers nothing (ValueError).
    """

    def __init__(self, folder: Path, on_error: OnError = "raise", refresh_seconds: float | None = None,
                 answer_path: str | None = None, traffic: TrafficRecorder | None = None):
        if refresh_seconds is not None and not refresh_seconds > 0:
            raise ValueError(f"refresh_seconds must be a positive number of seconds or None, got {refresh_seconds!r}")
        self._traffic = traffic
        self.store = folder
        self._on_error = on_error
        self._answer_path = answer_path
        self._swap = threading.Lock()  # one refresh at a time
        self._closed = threading.Event()
        try:
            self._served = open_in_service(folder, self._answer_path)
        except FilterLoadError as error:
            if on_error == "raise":
                raise
            self._served = InService(None, _degraded(folder, error))
        self._refresher = None
        if refresh_seconds is not None:
            self._refresher = threading.Thread(target=self._refresh_every, args=(refresh_seconds,),
                                               name=f"tamis-refresh {folder}", daemon=True)
            self._refresher.start()

    def refresh(self) -> bool:
        """Serve the version now in service if it is not the one served, and the keys added since;
        True when it swapped versions."""
        with self._swap:
            self._check_open()
            served = self._served
            try:
                if self._serves_build_in_service(served):
                    self._served = dataclasses.replace(served, pending=_pending_after(self.store, served.pending, served.through))
                    return False
                latest = open_in_service(self.store, self._answer_path)
            except (FilterLoadError, store.StoreError, OSError) as error:
                if self._on_error == "raise":
                    if isinstance(error, FilterLoadError):
                        raise
                    raise FilterLoadError(str(error)) from error
                if isinstance(error, AdditionsLoadError):
                    self._served = InService(served.version, _degraded(self.store, error))
                else:
                    LOG.error(f"{self.store}: version {served.version} stays in service here: {error}")
                return False
            self._served = latest
            return True

    def using(self, answer_path: str) -> ServedFilter:
        """Answer on `answer_path` from now on, this version and the ones refreshes swap in (as
        `MembershipFilter.using`); returns this handle. ValueError for a path this process cannot run."""
        with self._swap:
            served = self._current()
            check_path(answer_path)
            if not served.filter.degraded:
                self._served = dataclasses.replace(served, filter=served.filter.using(answer_path))
            self._answer_path = answer_path
        return self

    def _serves_build_in_service(self, served: InService) -> bool:
        """True when the store's version in service is the very build served (its number and its
        artifact file, which a store wiped and rebuilt does not keep)."""
        version = store.version_in_service(self.store)
        if version != served.version or served.filter.degraded:
            return False
        try:
            return _file_identity(self.store / str(version) / store.ARTIFACT_NAME) == served.identity
        except FileNotFoundError:
            return False

    def _refresh_every(self, seconds: float) -> None:
        while not self._closed.wait(seconds):
            try:
                if self._traffic is not None:
                    self._traffic.tick()
                self.refresh()
            except Exception:  # a thread must go on: the next interval tries again
                LOG.exception(f"{self.store}: refreshing the version in service failed; version {self.version} stays")

    def close(self) -> None:
        """Stop refreshing and answering; write the lookup sample still held."""
        if self._closed.is_set():
            return
        self._closed.set()
        if self._traffic is not None:
            self._traffic.flush()
        if self._refresher is not None and self._refresher is not threading.current_thread():
            self._refresher.join()

    def __enter__(self) -> ServedFilter:
        return self

    def __exit__(self, *exc_info) -> None:
        self.close()

    def _check_open(self) -> None:
        if self._closed.is_set():
            raise ValueError(f"the filter of store {self.store} is closed")

    def _current(self) -> InService:
        self._check_open()
        return self._served

    # Answers, each from the version served (and the keys added after it) when the query began.

    def contains(self, key: str | bytes) -> bool:
        served = self._current()
        if type(key) is not bytes:
            key = key_bytes(key)
        answer = key in served.pending.keys or served.filter.contains(key)  # one set probe more
        if self._traffic is not None:
            self._traffic.record_one(served.served, key, answer)
        return answer

    def contains_many(self, keys: Iterable[str | bytes] | np.ndarray | Any) -> np.ndarray:
        served = self._current()
        packed = pack_batch(keys)
        answers = served.filter.answer_packed(packed)
        if served.pending.keys and not served.filter.degraded:
            answers = served.pending.mark(packed, answers)
        if self._traffic is not None:
            offsets = packed.offsets
            self._traffic.record(served.served, lambda kept: [packed.buffer[offsets[i] : offsets[i + 1]] for i in kept], answers)
        return answers

    # The service's traffic (open with sample_folder= or observe=True).

    def _recorder(self) -> TrafficRecorder:
        if self._traffic is None:
            raise ValueError(f"the filter of store {self.store} records no traffic; open it with sample_folder=FOLDER "
                             f"(or observe=True) to confirm answers and observe the rate")
        return self._traffic

    def confirm(self, key: str | bytes, member: bool) -> None:
        """Say what the authoritative set answered for a key this filter answered "maybe": a member,
        or a false positive. The observed rate (`observed`) counts these."""
        key_bytes(key)  # the same check of the key as a lookup's
        self._recorder().confirm(self._served.served, bool(member))

    def observed(self, seconds: float | None = None) -> dict:
        """The false-positive rate observed in service, over the last `seconds` or since opening:
        lookups, false_positives, rate, rate_low, rate_high and more (`tamis.traffic.observed_figures`)."""
        return self._recorder().observed(seconds)

    def __contains__(self, key: str | bytes) -> bool:
        return self.contains(key)

    # What is served: cheap reads of the version served.

    @property
    def path(self) -> Path:
        """The artifact file of the version served (the store folder when none could be opened)."""
        return self._current().filter.path

    @property
    def version(self) -> int | None:
        return self._served.version

    @property
    def degraded(self) -> bool:
        return self._served.filter.degraded

    @property
    def added(self) -> int:
        """How many keys added after the served version was built are answered on top of it."""
        return len(self._served.pending.keys)

    @property
    def info(self) -> dict:
        served = self._served
        return {**served.filter.info, "version": served.version, "additions": {"folded_through": served.through,
                                                                              "pending_keys": len(served.pending.keys)}}

    @property
    def fpr(self) -> float | None:
        return self._served.filter.fpr

    @property
    def fpr_upper(self) -> float | None:
        return self._served.filter.fpr_upper

    @property
    def target(self) -> float | None:
        return self._served.filter.target

    @property
    def built_at(self) -> str | None:
        return self._served.filter.built_at

    def __repr__(self) -> str:
        served = self._served
        state = "closed" if self._closed.is_set() else f"version {served.version}"
        return f"ServedFilter({str(self.store)!r}, {state}: {served.filter!r})"


def open_filter(
    path: str | os.PathLike, on_error: OnError = "raise", answer_path: str | None = None, *,
    refresh_seconds: float | None = None, sample_folder: str | os.PathLike | None = None,
    sample_rate: float = DEFAULT_SAMPLE_RATE, observe: bool = False,
) -> MembershipFilter | DegradedFilter | ServedFilter:
    """Open an artifact written by `tamis.package.package_artifact`, or a store folder's version in
    service (a `ServedFilter`, refreshed every `refresh_seconds` when given).

    A store's filter can record its traffic (`tamis.traffic`): with `sample_folder`, each lookup is
    kept with probability `sample_rate` and the per-key counts are written there, one file per
    process and hour and on `close()`, for `tamis build --non-members FOLDER`; with `sample_folder`
    or `observe=True`, `confirm(key, member)` after each authoritative check of a "maybe" feeds
    `observed()`, the rate the service really gets, and a warning is logged when it rises above
    the certified bound.

    answer_path: "numpy" or "compiled" (`tamis.query`); by default `serving_path`: the compiled path
    when numba is installed and the build verified that path (the header's `verified_paths`), the
    numpy path otherwise (with a warning when numba is installed). Both give the same answers;
    `using` switches an opened filter or store handle.

    on_error="raise" (the default): raise FilterLoadError if the artifact is unusable.
    on_error="maybe": answer with a `DegradedFilter` instead, which answers True for every key, after
    logging the reason at ERROR level and issuing a RuntimeWarning, once, here.

    The file is read into memory once and checked there, and every answer comes from that copy:
    rewriting, truncating or replacing the file afterwards changes no answer of the opened filter.
    """
    if on_error not in ON_ERROR_CHOICES:
        raise ValueError(f"on_error must be one of {list(ON_ERROR_CHOICES)}, got {on_error!r}")
    path = Path(path)
    if path.is_dir():
        traffic = TrafficRecorder(sample_folder, sample_rate) if sample_folder is not None or observe else None
        return ServedFilter(path, on_error, refresh_seconds, answer_path, traffic)
    if refresh_seconds is not None or sample_folder is not None or observe:
        raise ValueError(f"refresh_seconds, sample_folder and observe apply to a store folder; {path} is not one")
    try:
        return _open_checked(path, answer_path)
    except FilterLoadError as error:
        if on_error == "raise":
            raise
        return _degraded(path, error)
