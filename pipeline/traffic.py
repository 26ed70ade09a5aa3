"""What a served filter sees of its traffic: a sample of the lookups it answers, for the nightly
build, and the false-positive rate the service observes from its confirmations of "maybe".

The sample. Each lookup is kept with probability p (`sample_rate`), independently of its key:
the kept lookups are a thinned copy of the traffic, so a key looked up c times appears about p c
times, heavy keys stay heavy and every share of lookups is kept in expectation. Per key counts are
summed in memory and written, one file per process and period, to a folder the owner names;
replicas write into one folder and the build sums their files (`read_sample_folder`). Keeping a
lookup is decided by counting down a geometric skip (the number of lookups before the next kept
one, drawn with P(skip = s) = (1 - p)^s p), which is the same Bernoulli(p) draw per lookup at the
cost of one subtraction per batch.

    p = 1/4096 (DEFAULT_SAMPLE_RATE): a service answering 100,000 lookups a second keeps about
    88,000 an hour; at most that many distinct keys, about 20 to 40 bytes each in a file (key,
    count, msgpack framing), so at most 1.7 to 3.4 MiB an hour, less when keys repeat.

The observed rate. The service confirms each "maybe" against its authoritative set and says what
it found (`confirm(key, member)`). Of the n = lookups - confirmed members lookups of non-members,
x were confirmed false positives: the observed rate is x / n, with a Wilson score interval (Wilson,
JASA 1927: centre (x + z^2/2) / (n + z^2), half-width z / (n + z^2) sqrt(x (n - x) / n + z^2 / 4)).
Maybes never confirmed widen the upper end (they count as false positives there). Counts are kept
per window of `window_seconds`; when a window closes with the lower end of a one-sided
`alarm_confidence` interval above the certified upper bound of the version it was served by, the
traffic is worse than the build promised: one warning for that window (a log record on the
`tamis.traffic` logger) and an entry in `alarms`.

A sample file (FORMAT.md, "Lookup sample files"):

    magic  b"TMSLKUP\\x00"                    8 bytes
    major, minor                            2 x uint16, little-endian (1, 0)
    payload length                          uint64, little-endian
    payload                                 msgpack map (below)
    checksum                                uint64, little-endian: xxh3-64 of the payload, seed 0

    payload: {"host": str, "pid": int, "instance": str, "period_from": float, "period_to": float (Unix seconds),
              "sample_rate": float, "served": [ {"build_id", "version", "fpr", "fpr_upper",
              "target", "lookups", "no", "maybe", "false_positives", "members"} ... ],
              "keys": [bin ...], "counts": [int ...]}

Only the standard library, numpy, xxhash and msgpack: the loader uses this module.
"""

from __future__ import annotations

import logging
import math
import os
import random
import socket
import struct
import threading
import time
from collections import deque
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import cached_property
from datetime import datetime, timezone
from pathlib import Path
from statistics import NormalDist

import msgpack
import numpy as np
import xxhash

from tamis.artifact import write_atomically
from tamis.errors import BadInput

LOG = logging.getLogger(__name__)

SAMPLE_SUFFIX = ".lookups"
SAMPLE_MAGIC = b"TMSLKUP\x00"
SAMPLE_VERSION = (1, 0)
_HEAD = struct.Struct("<8sHHQ")
_CHECKSUM = struct.Struct("<Q")

# 1/4096: see the module's docstring for the bytes an hour at 100,000 lookups a second.
DEFAULT_SAMPLE_RATE = 1 / 4096
# One file a process an hour: small enough to drop old hours by age, few enough to list quickly.
DEFAULT_PERIOD_SECONDS = 3600.0
# Five minutes a window: at 100,000 lookups a second and a rate near 1%, a window holds about
# 300,000 false positives, so a doubling of the rate is seen in the first window it lasts.
DEFAULT_WINDOW_SECONDS = 300.0
# Closed windows kept for `observed(seconds)`: a day of five-minute windows.
KEPT_WINDOWS = 288
# The confidence of the alarm's one-sided lower end: a window of traffic that behaves as certified
# raises it at most 1% of the time (less, since the certified bound sits above the true rate).
DEFAULT_ALARM_CONFIDENCE = 0.99
# The two-sided confidence of `observed()`'s interval.
OBSERVED_CONFIDENCE = 0.95


def wilson_interval(successes: int, trials: int, confidence: float, one_sided: bool = False) -> tuple[float, float]:
    """Wilson's score interval for a binomial proportion (Wilson, JASA 1927); (0, 1) for no trials."""
    if trials <= 0:
        return 0.0, 1.0
    z = NormalDist().inv_cdf(confidence if one_sided else 0.5 + confidence / 2)
    z2 = z * z
    centre = (successes + z2 / 2) / (trials + z2)
    half = z / (trials + z2) * math.sqrt(max(successes * (trials - successes) / trials, 0.0) + z2 / 4)
    return max(0.0, centre - half), min(1.0, centre + half)


@dataclass(frozen=True)
class Served:
    """The version a lookup was answered by: its build identity and what its build certified."""

    build_id: str | None
    version: int | None
    fpr: float | None
    fpr_upper: float | None
    target: float | None

    @cached_property
    def name(self) -> str:
        """The key its counts are filed under: the build's identity (a version number is reused
        by a store wiped and rebuilt)."""
        return self.build_id or f"version {self.version}"

    def as_dict(self) -> dict:
        return {"build_id": self.build_id, "version": self.version, "fpr": self.fpr,
                "fpr_upper": self.fpr_upper, "target": self.target}


# The counts a sample file keeps per version served (its "no" answers follow from them).
COUNT_FIELDS = ("lookups", "maybe", "false_positives", "members")


@dataclass
class Counts:
    """Lookups answered by one version: all of them, those answered no and maybe, and the maybes
    the service confirmed as non-members (false positives) and as members."""

    lookups: int = 0
    maybe: int = 0
    false_positives: int = 0
    members: int = 0

    def add(self, other: Counts) -> None:
        self.lookups += other.lookups
        self.maybe += other.maybe
        self.false_positives += other.false_positives
        self.members += other.members

    def as_dict(self) -> dict:
        return {"lookups": self.lookups, "no": self.lookups - self.maybe, "maybe": self.maybe,
                "false_positives": self.false_positives, "members": self.members}


def observed_figures(counts: Counts, confidence: float = OBSERVED_CONFIDENCE) -> dict:
    """The observed false-positive rate of some counts, with its interval (see the docstring)."""
    non_members = max(counts.lookups - counts.members, 0)
    unconfirmed = max(counts.maybe - counts.false_positives - counts.members, 0)
    low, _ = wilson_interval(counts.false_positives, non_members, confidence)
    _, high = wilson_interval(min(counts.false_positives + unconfirmed, non_members), non_members, confidence)
    return {
        **counts.as_dict(),
        "non_member_lookups": non_members,
        "unconfirmed": unconfirmed,
        "rate": counts.false_positives / non_members if non_members else None,
        "rate_low": low,
        "rate_high": high,
        "confidence": confidence,
    }


@dataclass
class _Window:
    start: float
    counts: dict[str, Counts] = field(default_factory=dict)


class TrafficRecorder:
    """Records the lookups a served filter answers (see the module's docstring). Thread-safe.

    folder: where sample files go (None: count and watch, write nothing). clock: Unix seconds
    (tests pass their own). seed: the sampling draws' seed (None: from the OS).
    """

    def __init__(self, folder: str | os.PathLike | None, sample_rate: float = DEFAULT_SAMPLE_RATE, *,
                 period_seconds: float = DEFAULT_PERIOD_SECONDS, window_seconds: float = DEFAULT_WINDOW_SECONDS,
                 alarm_confidence: float = DEFAULT_ALARM_CONFIDENCE, clock: Callable[[], float] = time.time,
                 seed: int | None = None):
        if not 0 <= sample_rate <= 1:
            raise ValueError(f"sample_rate must be a probability in [0, 1], got {sample_rate!r}")
        if not period_seconds > 0 or not window_seconds > 0:
            raise ValueError("period_seconds and window_seconds must be positive numbers of seconds")
        if not 0.5 < alarm_confidence < 1:
            raise ValueError(f"alarm_confidence must be in (0.5, 1), got {alarm_confidence!r}")
        self.folder = None if folder is None else Path(folder)
        if self.folder is not None and not self.folder.is_dir():
            raise BadInput(f"sample folder {self.folder} is not a folder; create it or name another")
        self.sample_rate = sample_rate
        self.period_seconds = period_seconds
        self.window_seconds = window_seconds
        self.alarm_confidence = alarm_confidence
        self.alarms: list[dict] = []
        self._clock = clock
        self._random = random.Random(seed)
        self._lock = threading.Lock()
        self._host = socket.gethostname()
        self._pid = os.getpid()
        self._instance = os.urandom(4).hex()  # a replica is one recorder: several may share a process
        self._files = 0
        now = clock()
        self._period_start = now
        self._period_keys: dict[bytes, int] = {}
        self._period_counts: dict[str, Counts] = {}
        self._served: dict[str, Served] = {}
        self._window = _Window(self._window_start(now))
        self._window_end = self._window.start + window_seconds
        self._windows: deque[_Window] = deque(maxlen=KEPT_WINDOWS)
        self._total: dict[str, Counts] = {}
        self._skip = self._draw_skip()

    # Sampling ------------------------------------------------------------------------------------

    def _draw_skip(self) -> int:
        """Lookups to pass before the next kept one: geometric with P(s) = (1 - p)^s p."""
        p = self.sample_rate
        if p >= 1:
            return 0
        if p <= 0:
            return 1 << 62
        return int(math.log(1.0 - self._random.random()) / math.log1p(-p))

    def _kept_positions(self, n: int) -> list[int]:
        """Positions in a batch of n lookups that the sample keeps (call with the lock held)."""
        kept = []
        while self._skip < n:
            kept.append(self._skip)
            self._skip += 1 + self._draw_skip()
        self._skip -= n
        return kept

    # Recording -----------------------------------------------------------------------------------

    def record(self, served: Served, keys: list[bytes] | Callable[[list[int]], list[bytes]], answers: np.ndarray) -> None:
        """Record a batch of lookups answered by `served`: `answers` and their keys, or a function
        from kept positions to those keys (so a batch builds bytes only for the few kept)."""
        n, maybe = len(answers), int(np.count_nonzero(answers))
        with self._lock:
            flush = self._roll(self._clock())
            counts = self._counts_for(served)
            counts.lookups += n
            counts.maybe += maybe
            kept = self._kept_positions(n)
            if kept:
                chosen = keys(kept) if callable(keys) else [keys[i] for i in kept]
                for key in chosen:
                    self._period_keys[key] = self._period_keys.get(key, 0) + 1
        if flush is not None:
            self._write(*flush)

    def record_one(self, served: Served, key: bytes, answer: bool) -> None:
        """`record` of one lookup, with no batch set-up: the hot path of a single-key service."""
        with self._lock:
            flush = self._roll(self._clock())
            counts = self._window.counts.get(served.name) or self._counts_for(served)
            counts.lookups += 1
            if answer:
                counts.maybe += 1
            if self._skip:
                self._skip -= 1
            else:
                self._period_keys[key] = self._period_keys.get(key, 0) + 1
                self._skip = self._draw_skip()
        if flush is not None:
            self._write(*flush)

    def confirm(self, served: Served, member: bool) -> None:
        """The service checked a "maybe" of `served` against its authoritative set."""
        flush = None
        with self._lock:
            flush = self._roll(self._clock())
            counts = self._counts_for(served)
            if member:
                counts.members += 1
            else:
                counts.false_positives += 1
        if flush is not None:
            self._write(*flush)

    def _counts_for(self, served: Served) -> Counts:
        """The current window's counts of `served` (lock held); the period's and the total follow
        when the window closes."""
        self._served[served.name] = served
        return self._window.counts.setdefault(served.name, Counts())

    # Windows and periods -------------------------------------------------------------------------

    def _window_start(self, now: float) -> float:
        return math.floor(now / self.window_seconds) * self.window_seconds

    def _close_window(self) -> None:
        """Fold the current window into the period and the total, and judge it (lock held)."""
        window = self._window
        for name, counts in window.counts.items():
            self._period_counts.setdefault(name, Counts()).add(counts)
            self._total.setdefault(name, Counts()).add(counts)
            self._judge(window, name, counts)
        self._windows.append(window)

    def _judge(self, window: _Window, name: str, counts: Counts) -> None:
        served = self._served[name]
        if served.fpr_upper is None:
            return
        non_members = counts.lookups - counts.members
        low, _ = wilson_interval(counts.false_positives, non_members, self.alarm_confidence, one_sided=True)
        if low <= served.fpr_upper:
            return
        alarm = {"window_from": window.start, "window_to": window.start + self.window_seconds, "version": served.version,
                 "build_id": served.build_id, "rate": counts.false_positives / non_members, "rate_low": low,
                 "certified_upper": served.fpr_upper}
        self.alarms.append(alarm)
        LOG.warning(
            f"false-positive rate observed in service {alarm['rate']:.4%} (at least {low:.4%} at "
            f"{self.alarm_confidence:.0%}) over {counts.false_positives:,} of {non_members:,} non-member lookups "
            f"is above version {served.version}'s certified upper bound {served.fpr_upper:.4%}: the traffic has moved "
            f"away from the build's sample; rebuild from the new lookup sample, or cap regions (max_region_fpr)"
        )

    def _roll(self, now: float):
        """Close the windows and the period that have ended by `now` (lock held); the period's
        contents to write, or None."""
        if now < self._window_end:
            return None
        self._close_window()
        self._window = _Window(self._window_start(now))
        self._window_end = self._window.start + self.window_seconds
        if now - self._period_start < self.period_seconds:
            return None
        return self._take_period(now)

    def _take_period(self, now: float):
        taken = (self._period_start, now, self._period_keys, self._period_counts, dict(self._served))
        self._period_start, self._period_keys, self._period_counts = now, {}, {}
        return taken

    def _write(self, start: float, end: float, keys: dict[bytes, int], counts: dict[str, Counts], served: dict[str, Served]) -> None:
        if self.folder is None or not (keys or counts):
            return
        payload = {
            "host": self._host, "pid": self._pid, "instance": self._instance, "period_from": start, "period_to": end,
            "sample_rate": self.sample_rate,
            "served": [{**served[name].as_dict(), **c.as_dict()} for name, c in counts.items()],
            "keys": list(keys), "counts": list(keys.values()),
        }
        stamp = datetime.fromtimestamp(start, timezone.utc).strftime("%Y%m%dT%H%M%SZ")
        self._files += 1
        name = f"{stamp}-{self._host}-{self._pid}-{self._instance}-{self._files}{SAMPLE_SUFFIX}"
        write_atomically(self.folder / name, [encode_sample(payload)])

    def tick(self) -> None:
        """Close the window and the period that have ended by now, with no lookup to trigger it (a
        served filter's refresh thread calls this, so an idle service still writes its hour)."""
        with self._lock:
            flush = self._roll(self._clock())
        if flush is not None:
            self._write(*flush)

    def flush(self) -> None:
        """Close the current window and period now and write the period's file."""
        with self._lock:
            now = self._clock()
            self._close_window()
            self._window = _Window(now)
            self._window_end = now + self.window_seconds
            taken = self._take_period(now)
        self._write(*taken)

    # Reading -------------------------------------------------------------------------------------

    def observed(self, seconds: float | None = None) -> dict:
        """Observed figures over the last `seconds` (whole windows; the current one included), or
        since the recorder started: `observed_figures` of the summed counts, and per version."""
        with self._lock:
            now = self._clock()
            windows = [*self._windows, self._window]
            if seconds is None:
                per_version = {name: Counts() for name in self._served}
                for name, counts in self._total.items():
                    per_version[name].add(counts)
                for name, counts in self._window.counts.items():
                    per_version[name].add(counts)
            else:
                per_version = {}
                for window in windows:
                    if window.start + self.window_seconds > now - seconds:
                        for name, counts in window.counts.items():
                            per_version.setdefault(name, Counts()).add(counts)
            served = dict(self._served)
        total = Counts()
        for counts in per_version.values():
            total.add(counts)
        return {
            **observed_figures(total),
            "seconds": seconds,
            "versions": [{**served[name].as_dict(), **observed_figures(counts)} for name, counts in per_version.items()],
            "alarms": len(self.alarms),
        }


# ---------------------------------------------------------------------------------------------------
# Files
# ---------------------------------------------------------------------------------------------------


def encode_sample(payload: dict) -> bytes:
    body = msgpack.packb(payload, use_bin_type=True)
    return _HEAD.pack(SAMPLE_MAGIC, *SAMPLE_VERSION, len(body)) + body + _CHECKSUM.pack(xxhash.xxh3_64_intdigest(body))


def decode_sample(path: Path, data: bytes) -> dict:
    """The payload of a sample file; BadInput naming the file when it is torn or not one."""
    def refuse(why: str) -> BadInput:
        return BadInput(f"{path}: not a whole lookup sample file ({why}); remove it from the sample folder, "
                        f"or move it elsewhere if it is not one")

    if len(data) < _HEAD.size + _CHECKSUM.size or data[:8] != SAMPLE_MAGIC:
        raise refuse("it does not begin with the sample magic")
    _, major, _, length = _HEAD.unpack_from(data)
    if major != SAMPLE_VERSION[0]:
        raise refuse(f"format {major}.x, this tamis reads {SAMPLE_VERSION[0]}.x")
    if len(data) != _HEAD.size + length + _CHECKSUM.size:
        raise refuse(f"{len(data):,} bytes where its head announces {_HEAD.size + length + _CHECKSUM.size:,}")
    body = data[_HEAD.size : _HEAD.size + length]
    if _CHECKSUM.unpack_from(data, _HEAD.size + length)[0] != xxhash.xxh3_64_intdigest(body):
        raise refuse("its checksum does not match")
    try:
        payload = msgpack.unpackb(body, raw=False, max_bin_len=1 << 20, strict_map_key=True)
        keys, counts = payload["keys"], payload["counts"]
        ok = (isinstance(keys, list) and isinstance(counts, list) and len(keys) == len(counts)
              and all(type(k) is bytes and k for k in keys) and all(type(c) is int and c > 0 for c in counts)
              and isinstance(payload["served"], list) and isinstance(payload["period_to"], (int, float)))
    except (ValueError, KeyError, TypeError, msgpack.UnpackException) as error:
        raise refuse(f"its payload cannot be read: {error}") from None
    if not ok:
        raise refuse("its keys, counts or served versions are malformed")
    return payload


@dataclass(frozen=True)
class SampleFolder:
    """A folder of sample files, summed: distinct keys with their counts, and what it held."""

    keys: list[bytes]
    counts: np.ndarray
    files: int
    skipped_old: int
    replicas: int
    sample_rates: list[float]
    period_from: float | None
    period_to: float | None
    served: list[dict]

    def as_report(self) -> dict:
        def stamp(t):
            return None if t is None else datetime.fromtimestamp(t, timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")

        return {"files": self.files, "skipped_old_files": self.skipped_old, "replicas": self.replicas,
                "sample_rates": self.sample_rates, "period_from": stamp(self.period_from), "period_to": stamp(self.period_to),
                "keys": len(self.keys), "lookups": int(self.counts.sum()) if len(self.counts) else 0, "served": self.served}


def is_sample_folder(path: Path) -> bool:
    """A folder holding at least one sample file (by its suffix)."""
    return path.is_dir() and any(p.suffix == SAMPLE_SUFFIX for p in path.iterdir())


def sample_files(folder: Path) -> list[Path]:
    """The sample files of a folder, by name; a file that is neither one nor a writer's temporary
    (a dot name) is refused, naming it."""
    files = []
    for path in sorted(folder.iterdir()):
        if path.name.startswith("."):
            continue  # a writer's temporary file: whole once renamed, never read before
        if path.suffix != SAMPLE_SUFFIX or not path.is_file():
            raise BadInput(f"{path}: not a lookup sample file (*{SAMPLE_SUFFIX}) in the sample folder {folder}; "
                           f"move it elsewhere")
        files.append(path)
    return files


def read_sample_folder(folder: Path, max_age_seconds: float | None, now: float) -> SampleFolder:
    """Every sample file of `folder` whose period ended at most `max_age_seconds` before `now`,
    summed key by key; served versions' counts summed per build."""
    totals: dict[bytes, int] = {}
    counts: dict[str, tuple[Served, Counts]] = {}
    replicas, rates, starts, ends = set(), set(), [], []
    files = skipped = 0
    for path in sample_files(folder):
        payload = decode_sample(path, path.read_bytes())
        if max_age_seconds is not None and payload["period_to"] < now - max_age_seconds:
            skipped += 1
            continue
        files += 1
        replicas.add((payload["host"], payload["pid"], payload.get("instance")))
        rates.add(float(payload["sample_rate"]))
        starts.append(payload["period_from"])
        ends.append(payload["period_to"])
        for key, count in zip(payload["keys"], payload["counts"]):
            totals[key] = totals.get(key, 0) + count
        for entry in payload["served"]:
            meta = Served(*(entry.get(k) for k in ("build_id", "version", "fpr", "fpr_upper", "target")))
            counts.setdefault(meta.name, (meta, Counts()))[1].add(Counts(**{k: int(entry.get(k, 0)) for k in COUNT_FIELDS}))
    if len(rates) > 1:
        raise BadInput(f"{folder}: its files were sampled at different rates {sorted(rates)}; their counts cannot be summed "
                       f"as one sample; keep one rate a folder")
    observed = [{**meta.as_dict(), **observed_figures(summed)} for meta, summed in counts.values()]
    return SampleFolder(
        keys=list(totals), counts=np.fromiter(totals.values(), dtype=np.int64, count=len(totals)),
        files=files, skipped_old=skipped, replicas=len(replicas), sample_rates=sorted(rates),
        period_from=min(starts) if starts else None, period_to=max(ends) if ends else None, served=observed,
    )
