"""Corpus stage: read members and non-members, validate them, dedupe, resolve conflicts, split.

Sources are one key a line (any extension but the table ones), or a table: CSV (`.csv`), Parquet
(`.parquet`, `.pq`) or NDJSON (`.ndjson`, `.jsonl`) with a `key` column and, for non-members, an
optional `count` column of lookups (other names: corpus.key_column and corpus.count_column; a
column name given twice, or numbers in another column where no count column is found, are refused
rather than guessed at). Keys become bytes: UTF-8 of the text unless the corpus is read
with key_encoding = "bytes" (one-key-a-line files, where any byte but newline is allowed, and
Parquet binary columns). A one-key-a-line file is read by `tamis.keylines`: in bytes mode no byte
of a key is changed, and a line ending in a carriage return is refused. An empty file holds no keys.
A source may also be a dataset in partitions: a folder of such files, or a glob pattern of them
(`source_files`), read one by one in the order of their names and joined, the same corpus as one
file of them all (on a Dask cluster the workers read them: tamis.cluster_corpus).

Every refusal is a BadInput naming the file, the place and the fix. Places count from 1: "line N" of
a one-key-a-line or NDJSON file, "row N (line N+1)" of a CSV (its header is line 1; the line is
exact unless a quoted key spans lines), "row N" of a Parquet table. A path that cannot be opened
for good (missing, a folder, no permission) is bad input; any other OSError (an I/O error of a
network filesystem, say) propagates, so that the flow may retry the read.

Before reading, the memory the build will need is estimated from the file sizes
(`estimate_build_memory`), and a corpus that cannot fit is refused at once rather than after
minutes of reading and training.

Non-members looked up at least tau times in the window (`heavy_cutoff`) are heavy: a take-all
stratum that trains the model, enters the region plan with its exact weights and is answered
exactly by verify (see tamis.verify). The light ones are split by a seeded xxh3-64 hash of the key,
so a key stays in the same part from one nightly build to the next (invariant 3): `train` teaches
the model, `validation` gives the region plan the tail's shares, `heldout` only measures the tail.
"""

from __future__ import annotations

import csv
import errno
import glob
import io
import json
import math
import os
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
import xxhash

from tamis.config import DEFAULT_COUNT_COLUMN, CorpusSettings
from tamis.errors import BadInput
from tamis.keylines import KeyLinesError, split_key_lines
from tamis.keylines import line_of_offset as _line_of_offset
from tamis.provenance import build_time
from tamis.traffic import is_sample_folder, read_sample_folder, sample_files

# A source path holding one of these is a glob pattern of partitions (when no file has that very name).
_GLOB_CHARACTERS = set("*?[")

TABLE_SUFFIXES = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet", ".ndjson": "ndjson", ".jsonl": "ndjson"}

# The hash split draws a bucket in [0, 10,000) per key: shares are honoured to 0.01%.
_SPLIT_BUCKETS = 10_000

# Counts are parsed as float64; every whole number up to 2^53 is exact there, larger ones are not
# (and no real lookup log holds 9 quadrillion lookups of one key).
MAX_COUNT = 2**53

# Failures to open that no retry can cure, with the fix each needs; other errno values propagate.
_OPEN_PROBLEMS = {
    errno.ENOENT: "no such file; check the path",
    errno.ENOTDIR: "a part of the path is a file, not a folder; check the path",
    errno.EISDIR: "is a folder, not a file; give the path of the key file inside it",
    errno.EACCES: "permission denied; make the file readable by the user running the build",
    errno.EPERM: "permission denied; make the file readable by the user running the build",
    errno.ELOOP: "too many levels of symbolic links; check the path",
    errno.ENAMETOOLONG: "the path is too long; check it",
}

# Memory a build holds at its peak, measured by benchmarks/scale.py (the maximum resident set of a
# `tamis build` process, from os.wait4) on Emberfall demo corpora of one member to nine looked-up non-members
# (keys of about 12 bytes, default settings, numba, 300,000 training non-members): 1M keys peaked at
# 1.28 GiB, 3M at 2.02 GiB and 10M at 4.85 GiB, a slope of about 426 bytes a key (its bytes
# objects, its float32 row of 89 features while members and validation keys are scored, its share
# of the lookup tables) over a base of about 0.88 GiB (Python, polars, LightGBM with pandas and
# scikit-learn, numba, Prefect, the training set). A training sample of 1M non-members instead of
# 300,000 added 0.64 GiB at 10M keys. Rounded up here, for the estimate informs a refusal: a build
# is refused only when even this estimate exceeds the memory available. Key length barely counts:
# 220,000 keys of 112 bytes peaked at 385 MiB against 387 MiB for the same keys of 12 bytes (a
# build without Prefect), so the estimate counts keys only.
BUILD_BYTES_PER_KEY = 450
BUILD_BASE_BYTES = 900 * 2**20
# Rows of a text source are estimated from the line ends in its first MiB.
_SAMPLE_BYTES = 1 << 20

# Overrides the available memory, in bytes or with a K, M, G or T suffix (powers of 1024).
MEMORY_LIMIT_ENV = "TAMIS_MEMORY_LIMIT"
_SIZE_SUFFIXES = {"": 1, "K": 2**10, "M": 2**20, "G": 2**30, "T": 2**40}


# The automatic tau: a key is heavy once its window count is known to within 25% at 95% confidence
# (Poisson: 1.645 / sqrt(c) <= 0.25, so c >= 43.3): its share of tomorrow's lookups is then its
# share of the window's, well enough to answer it exactly instead of sampling it. Lower cutoffs
# take more keys out of the sample (a tighter tail bound) but treat keys as recurring whose count
# is mostly noise; `benchmarks/heavy_tail.py CASE --heavy-count T` compares the bytes of other choices.
AUTO_HEAVY_COUNT = 44


def heavy_cutoff(settings: CorpusSettings) -> int:
    """tau: corpus.heavy_count, or AUTO_HEAVY_COUNT when it is 0."""
    return settings.heavy_count or AUTO_HEAVY_COUNT


@dataclass(frozen=True)
class KeySet:
    """Distinct keys with their lookup counts (1 each when the source has none)."""

    keys: list[bytes]
    counts: np.ndarray

    @property
    def lookups(self) -> int:
        return int(self.counts.sum())


@dataclass(frozen=True)
class Corpus:
    """Members; the heavy non-members (count at least tau); the light ones split by hash."""

    members: list[bytes]
    heavy: KeySet
    train: KeySet
    validation: KeySet
    check: KeySet
    heldout: KeySet
    tau: int
    has_counts: bool
    stats: dict

    @property
    def lookups(self) -> int:
        """All non-member lookups of the window."""
        return sum(part.lookups for part in self.non_member_parts)

    @property
    def non_members(self) -> int:
        return sum(len(part.keys) for part in self.non_member_parts)

    @property
    def non_member_parts(self) -> tuple[KeySet, ...]:
        """Every non-member part: the heavy keys, then the light ones by part."""
        return (self.heavy, self.train, self.validation, self.check, self.heldout)


def plan_weights(corpus: Corpus) -> np.ndarray:
    """Weights of the validation keys then the heavy keys, for the region plan and the model's
    pricing: heavy keys weigh their counts, validation keys their counts scaled so that together
    they weigh what all light keys weigh in the window. Shares of these weights are then the
    window's shares of lookups, heavy keys exact and the tail estimated."""
    light = corpus.lookups - corpus.heavy.lookups
    scale = light / corpus.validation.lookups
    return np.concatenate([corpus.validation.counts * scale, corpus.heavy.counts]).astype(np.float64)


@dataclass(frozen=True)
class RawSource:
    keys: list[bytes]
    counts: np.ndarray | None
    rows: int


# ---------------------------------------------------------------------------------------------------
# Opening and memory, before any key is read
# ---------------------------------------------------------------------------------------------------


def _format_of(path: Path) -> str:
    return TABLE_SUFFIXES.get(path.suffix.lower(), "lines")


def require_readable(path: Path) -> None:
    """Raise BadInput when `path` cannot be opened for a reason no retry cures."""
    try:
        with open(path, "rb"):
            pass
    except OSError as exc:
        if exc.errno not in _OPEN_PROBLEMS:
            raise
        raise BadInput(f"cannot read {path}: {_OPEN_PROBLEMS[exc.errno]}") from None


@dataclass(frozen=True)
class MemoryEstimate:
    """What a build over some source files will hold at its peak, estimated from their sizes."""

    keys: int
    needed_bytes: int


def estimate_rows(path: Path) -> int:
    """Rows of a source, without reading it: Parquet's own row count, or the line ends of a text
    file's first MiB scaled to its size."""
    size = path.stat().st_size
    if size == 0:
        return 0
    if _format_of(path) == "parquet":
        try:
            return int(pl.scan_parquet(path).select(pl.len()).collect().item())
        except pl.exceptions.PolarsError:
            return 0  # not Parquet at all: reading it says so
    with open(path, "rb") as handle:
        sample = handle.read(_SAMPLE_BYTES)
    lines = sample.count(b"\n") + (not sample.endswith(b"\n"))
    return lines if len(sample) == size else math.ceil(lines * size / len(sample))


def estimate_build_memory(paths: list[Path]) -> MemoryEstimate:
    """Peak memory of a build over these sources: the measured base plus a cost per key."""
    keys = sum(estimate_rows(path) for path in paths)
    return MemoryEstimate(keys, BUILD_BASE_BYTES + keys * BUILD_BYTES_PER_KEY)


def _parse_size(text: str) -> int:
    match = re.fullmatch(r"\s*(\d+)\s*([KMGT]?)i?B?\s*", text, flags=re.IGNORECASE)
    if not match:
        raise BadInput(
            f"environment variable {MEMORY_LIMIT_ENV}={text!r} is not a size; give bytes, or a number with "
            f"K, M, G or T (e.g. 8G)"
        )
    return int(match[1]) * _SIZE_SUFFIXES[match[2].upper()]


def _meminfo_available() -> int | None:
    """MemAvailable of /proc/meminfo: the kernel's estimate of what can be allocated without swapping."""
    try:
        with open("/proc/meminfo", encoding="ascii") as handle:
            for line in handle:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return None
    return None


def _cgroup_available() -> int | None:
    """What a cgroup v2 memory limit (a container's) still allows, when there is one."""
    try:
        limit = Path("/sys/fs/cgroup/memory.max").read_text().strip()
        used = int(Path("/sys/fs/cgroup/memory.current").read_text())
    except (OSError, ValueError):
        return None
    return None if limit == "max" else max(0, int(limit) - used)


def available_memory() -> int:
    """Bytes a build may use: TAMIS_MEMORY_LIMIT when set, else the smaller of MemAvailable and a
    container's cgroup allowance, else the free pages (os.sysconf)."""
    override = os.environ.get(MEMORY_LIMIT_ENV)
    if override:
        return _parse_size(override)
    figures = [f for f in (_meminfo_available(), _cgroup_available()) if f is not None]
    if figures:
        return min(figures)
    return os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")


def _gib(value: int) -> str:
    return f"{value / 2**30:.1f} GiB"


def source_files(path: Path) -> list[Path]:
    """The files of a source: the file itself, or the partitions of a folder or of a glob pattern
    (`members/*.parquet`), by name. Names starting with "." or "_" are skipped: the temporaries and
    markers (`_SUCCESS`, `_metadata`) that writers of partitioned datasets leave beside the data,
    common practice of those writers. Raises BadInput when a folder or pattern gives no file."""
    if path.is_dir():
        found, problem = list(path.iterdir()), f"{path} is a folder holding no key files"
    elif _GLOB_CHARACTERS & set(str(path)) and not path.exists():
        found, problem = [Path(name) for name in glob.glob(str(path))], f"no file matches {path}"
    else:
        return [path]
    files = sorted(entry for entry in found if not entry.name.startswith((".", "_")))
    if not files:
        raise BadInput(f"{problem}; give a key file, a folder of partitions (Parquet, CSV, NDJSON or one key a line) "
                       f"or a pattern that matches some")
    for entry in files:
        if entry.is_dir():
            raise BadInput(f"{entry}: a folder inside the partitions of {path}; give the partitions as files of one "
                           f"folder (or a pattern that matches files only)")
    return files


def check_sources(members_path: Path, non_members_path: Path) -> MemoryEstimate:
    """Both sources open, and the build they make fits in memory; raises BadInput otherwise.

    Cheap (file sizes and a 1 MiB sample), so a caller may run it before starting anything heavy.
    """
    sampled = is_sample_folder(non_members_path)
    files = source_files(members_path) + ([] if sampled else source_files(non_members_path))
    for path in files:
        require_readable(path)
    estimate = estimate_build_memory(files + (sample_files(non_members_path) if sampled else []))
    available = available_memory()
    if estimate.needed_bytes > available:
        raise BadInput(
            f"{members_path} and {non_members_path} hold about {estimate.keys:,} keys (estimated from the file "
            f"sizes); a build of them needs about {_gib(estimate.needed_bytes)} (about {BUILD_BYTES_PER_KEY} bytes "
            f"a key), more than the {_gib(available)} of memory available; build on a larger machine or from a "
            f"sample of the non-members (or set {MEMORY_LIMIT_ENV} to the memory the build may really use)"
        )
    return estimate


# ---------------------------------------------------------------------------------------------------
# Reading one source
# ---------------------------------------------------------------------------------------------------


def _first_invalid_utf8(keys: list[bytes]) -> int | None:
    """Index of the first key that is not valid UTF-8, or None.

    One decode of all keys joined by newlines: an ASCII separator never belongs to a multi-byte
    sequence, so the decoder fails exactly when some key is invalid, inside the first such key.
    """
    joined = b"\n".join(keys)
    try:
        joined.decode("utf-8")
    except UnicodeDecodeError as exc:
        ends = np.cumsum(np.fromiter((len(k) + 1 for k in keys), dtype=np.int64, count=len(keys)))
        return int(np.searchsorted(ends, exc.start, side="right"))
    return None


def _read_lines(path: Path, raw: bytes, encoding: str) -> list[bytes]:
    try:
        return split_key_lines(raw, encoding, bytes_option='key_encoding = "bytes" (--key-encoding bytes)')
    except KeyLinesError as exc:
        raise BadInput(f"{path}: {exc}") from None


def _csv_problem(text: str) -> str | None:
    """The first line of a CSV that Python's strict CSV reader rejects, or whose field count differs
    from the header's; None when it finds nothing wrong."""
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    width = None
    while True:
        start = reader.line_num + 1
        try:
            row = next(reader)
        except StopIteration:
            return None
        except csv.Error as exc:
            if "end of data" in str(exc):
                return f"line {start}: a quoted field opened here is never closed; close the quote (write a quote inside a quoted field as \"\")"
            return f"line {start}: {exc}; quote the whole field and write a quote inside it as \"\""
        if width is None:
            width = len(row)
        elif row and len(row) != width:
            return f"line {start} has {len(row)} fields where the header has {width}; quote fields that contain commas"


def _ndjson_problem(text: str) -> str | None:
    """The first line of an NDJSON file that is not a JSON object, or None."""
    for number, line in enumerate(text.split("\n"), start=1):
        if not line.strip():
            continue
        try:
            value = json.loads(line)
        except json.JSONDecodeError as exc:
            return f"line {number} is not valid JSON ({exc.msg} at column {exc.colno}); write one JSON object a line"
        if not isinstance(value, dict):
            return f"line {number} holds a JSON {type(value).__name__}, not an object; write one object a line, like {{\"key\": \"...\"}}"
    return None


def _table_problem(path: Path, kind: str, error: Exception) -> str:
    """Why polars could not read a table, with the line when the text shows it."""
    said = str(error).splitlines()[0] if str(error) else type(error).__name__
    if kind == "parquet":
        return (
            f"{path}: not a readable Parquet file ({said}); write it with a Parquet writer, or give it the "
            f"suffix of its real format (.csv, .ndjson, or .txt for one key a line)"
        )
    raw = path.read_bytes()
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        return (
            f"{path}: line {_line_of_offset(raw, exc.start)} is not valid UTF-8 (byte {exc.start}); a {kind} file "
            f"holds text: fix the line, or give raw keys one a line (or in a Parquet binary column) read with "
            f"key_encoding = \"bytes\""
        )
    found = _csv_problem(text) if kind == "csv" else _ndjson_problem(text)
    if found:
        return f"{path}: {found}"
    return f"{path}: cannot read as {kind}: {said}; check that the file is {kind}"


def _scan(path: Path, kind: str) -> pl.LazyFrame:
    if kind == "csv":
        return pl.scan_csv(path, infer_schema=False)  # every column as text; counts parsed below
    if kind == "parquet":
        return pl.scan_parquet(path)
    return pl.scan_ndjson(path)


def _duplicate_name(names: list[str]) -> str | None:
    """The first column name given twice, or None."""
    seen: set[str] = set()
    for name in names:
        if name in seen:
            return name
        seen.add(name)
    return None


def _csv_header(path: Path) -> list[str]:
    """The column names a CSV's first line gives, as written (polars renames a repeated name)."""
    with open(path, encoding="utf-8-sig", newline="") as handle:
        return next(csv.reader(handle), [])


def _ndjson_repeated_name(path: Path) -> str | None:
    """A name given twice inside one object among the objects of an NDJSON file's first MiB, or
    None. A JSON parser keeps one of the two values without a word (polars the first, Python's json
    the last), so a repeated name is refused rather than read one way or the other. The sample
    catches a writer that repeats a name in every row; checking every line would cost a JSON parse
    of each in Python."""
    with open(path, "rb") as handle:
        sample = handle.read(_SAMPLE_BYTES)
    found: list[str] = []

    def pairs(items: list[tuple[str, object]]) -> dict:
        repeated = _duplicate_name([name for name, _ in items])
        if repeated is not None:
            found.append(repeated)
        return dict(items)

    lines = sample.split(b"\n")
    for line in lines if len(sample) < _SAMPLE_BYTES else lines[:-1]:  # the last line of a cut sample is partial
        try:
            json.loads(line, object_pairs_hook=pairs) if line.strip() else None
        except ValueError:
            return None  # not JSON: reading the file says where
        if found:
            return found[0]
    return None


def _refuse_repeated_columns(path: Path, kind: str) -> None:
    repeated = None
    if kind == "csv":
        header = _csv_header(path)
        repeated = _duplicate_name(header)
        listed = ", ".join(header)
    elif kind == "ndjson":
        repeated = _ndjson_repeated_name(path)
        listed = None
    if repeated is not None:
        shown = f" (columns: {listed})" if listed else " in one object"
        raise BadInput(
            f"{path}: the column name `{repeated}` is given twice{shown}, so which one to read cannot be told; "
            f"give each column its own name"
        )


def _holds_numbers(lazy: pl.LazyFrame, name: str, dtype: pl.DataType) -> bool:
    """True for a numeric column, or a text one (CSV) whose every filled value reads as a number."""
    if dtype == pl.Boolean:
        return False
    if dtype.is_numeric():
        return True
    if dtype != pl.String:
        return False
    values = lazy.select(pl.col(name)).collect().to_series().drop_nulls()
    return len(values) > 0 and values.cast(pl.Float64, strict=False).null_count() == 0


def _count_column(path: Path, lazy: pl.LazyFrame, schema: pl.Schema, settings: CorpusSettings) -> str | None:
    """The column of lookup counts: corpus.count_column when it is there; none when it is empty,
    or when it is the default name, absent, and no other column holds numbers. Any other case is
    refused: a named column that is missing, or numbers in a column of another name (they may be
    the counts; reading every key as looked up once would be a silent guess)."""
    wanted = settings.count_column
    if not wanted:
        return None
    if wanted in schema:
        return wanted
    columns = ", ".join(schema.names())
    if wanted != DEFAULT_COUNT_COLUMN:
        raise BadInput(
            f"{path}: no `{wanted}` column for the lookup counts (columns: {columns}); give the name of the count "
            f"column with --count-column NAME (corpus.count_column), or an empty name to count every key once"
        )
    numeric = [name for name, dtype in schema.items() if name != settings.key_column and _holds_numbers(lazy, name, dtype)]
    if numeric:
        raise BadInput(
            f"{path}: no `count` column, but column `{numeric[0]}` holds numbers (columns: {columns}); if it counts "
            f"lookups, pass --count-column {numeric[0]} (corpus.count_column = \"{numeric[0]}\"); if not, pass "
            f"--count-column '' (corpus.count_column = \"\") to count every key once"
        )
    return None


def _read_frame(path: Path, kind: str, settings: CorpusSettings, want_counts: bool) -> pl.DataFrame:
    """The key column as `key` (and the count column as `count`, when wanted and found: see
    `_count_column`) of a table, read lazily: polars reads only those columns of the file (of a
    Parquet file, only their column chunks). A column name given twice is refused."""
    try:
        _refuse_repeated_columns(path, kind)
        lazy = _scan(path, kind)
        schema = lazy.collect_schema()
        key = settings.key_column
        if key not in schema:
            raise BadInput(
                f"{path}: no `{key}` column (columns: {', '.join(schema.names()) or 'none'}); name the key column "
                f"`{key}`, or give its name with --key-column NAME (corpus.key_column)"
            )
        count = _count_column(path, lazy, schema, settings) if want_counts else None
        wanted = [pl.col(key).alias("key")] + ([pl.col(count).alias("count")] if count else [])
        return lazy.select(wanted).collect()
    except (pl.exceptions.PolarsError, ValueError) as exc:
        raise BadInput(_table_problem(path, kind, exc)) from None


def _place(path: Path, kind: str, row: int) -> str:
    """Where key `row` (0-based) of a source is, in the words of the module docstring."""
    if kind == "lines":
        return f"line {row + 1}"
    if kind == "csv":
        return f"row {row + 1} (line {row + 2})"
    if kind == "ndjson":
        # polars skips blank lines: find the line of the row-th object
        lines = path.read_bytes().split(b"\n")
        filled = [number for number, line in enumerate(lines, start=1) if line.strip()]
        return f"line {filled[row]}" if row < len(filled) else f"row {row + 1}"
    return f"row {row + 1}"


def _read_counts(path: Path, kind: str, column: pl.Series, name: str) -> np.ndarray:
    """Lookup counts as int64; each must be a whole number from 1 to MAX_COUNT."""
    if column.dtype == pl.Boolean or not (column.dtype.is_numeric() or column.dtype == pl.String):
        raise BadInput(f"{path}: column `{name}` holds {column.dtype}; write counts as whole numbers of lookups")
    values = column.cast(pl.Float64, strict=False)
    bad = (values.is_null() | values.is_nan() | (values < 1) | (values > MAX_COUNT) | (values != values.floor())).fill_null(True)
    if bad.any():
        row = int(bad.arg_true()[0])
        raise BadInput(
            f"{path}: {_place(path, kind, row)} has count {column[row]!r}; counts must be whole numbers from 1 "
            f"to 2^53 (drop the row of a key never looked up)"
        )
    return values.cast(pl.Int64).to_numpy()


def _read_table(path: Path, kind: str, settings: CorpusSettings, want_counts: bool) -> tuple[list[bytes], np.ndarray | None]:
    encoding = settings.key_encoding
    if encoding == "bytes" and kind != "parquet":
        raise BadInput(
            f"{path}: key_encoding \"bytes\" reads one-key-a-line files and Parquet tables; a {kind} file holds text: "
            f"use key_encoding = \"utf-8\", or convert the file"
        )
    frame = _read_frame(path, kind, settings, want_counts)
    key_column = frame["key"]
    if key_column.dtype not in (pl.String, pl.Binary):
        raise BadInput(f"{path}: column `{settings.key_column}` holds {key_column.dtype}, expected text; write keys as strings")
    nulls = key_column.is_null()
    if nulls.any():
        place = _place(path, kind, int(nulls.arg_true()[0]))
        raise BadInput(f"{path}: {place} has no key (null or an empty field); remove the row or give it a key")
    keys = key_column.cast(pl.Binary).to_list()
    if key_column.dtype == pl.Binary and encoding == "utf-8":
        bad = _first_invalid_utf8(keys)
        if bad is not None:
            raise BadInput(
                f"{path}: {_place(path, kind, bad)} holds a key that is not valid UTF-8; fix the key, or read keys "
                f"as raw bytes with key_encoding = \"bytes\" (--key-encoding bytes)"
            )
    counts = _read_counts(path, kind, frame["count"], settings.count_column) if "count" in frame.columns else None
    return keys, counts


def _check_lengths(path: Path, kind: str, keys: list[bytes], max_key_bytes: int) -> None:
    if not keys:
        return
    lengths = np.fromiter(map(len, keys), dtype=np.int64, count=len(keys))
    if lengths.min() == 0:
        raise BadInput(f"{path}: {_place(path, kind, int(np.argmin(lengths)))} has an empty key; remove it")
    if lengths.max() > max_key_bytes:
        where = int(np.argmax(lengths))
        raise BadInput(
            f"{path}: {_place(path, kind, where)} has a key of {lengths[where]} bytes, over max_key_bytes = {max_key_bytes}; "
            f"raise corpus.max_key_bytes or shorten the key"
        )


def read_file(path: Path, settings: CorpusSettings, want_counts: bool) -> RawSource:
    """Keys (and counts) of one source file, checked for empty, over-long and undecodable keys."""
    require_readable(path)
    kind = _format_of(path)
    if path.stat().st_size == 0:
        return RawSource([], None, 0)
    if kind == "lines":
        keys, counts = _read_lines(path, path.read_bytes(), settings.key_encoding), None
    else:
        keys, counts = _read_table(path, kind, settings, want_counts)
    _check_lengths(path, kind, keys, settings.max_key_bytes)
    return RawSource(keys, counts, len(keys))


def counted_partitions(source: Path, partitions: Sequence[tuple[Path, RawSource]]) -> bool:
    """Whether a source's partitions carry lookup counts: all that hold keys, or none. A mix is
    refused (a partition without counts would count each of its keys once, a silent guess)."""
    holding = [(path, part) for path, part in partitions if part.rows]
    counted = [path for path, part in holding if part.counts is not None]
    if counted and len(counted) < len(holding):
        uncounted = next(path for path, part in holding if part.counts is None)
        raise BadInput(f"{source}: partition {uncounted} has no count column while {counted[0]} has one; give every "
                       f"partition the same columns")
    return bool(counted)


def read_source(path: Path, settings: CorpusSettings, want_counts: bool) -> RawSource:
    """Keys (and counts) of a source: one file, or every partition of a folder or pattern
    (`source_files`) read in turn and joined in the order of their names."""
    files = source_files(path)
    if files == [path]:
        return read_file(path, settings, want_counts)
    parts = [(file, read_file(file, settings, want_counts)) for file in files]
    counted = counted_partitions(path, parts)
    keys = [key for _, part in parts for key in part.keys]
    counts = np.concatenate([part.counts for _, part in parts if part.rows]) if counted else None
    return RawSource(keys, counts, len(keys))


# ---------------------------------------------------------------------------------------------------
# The corpus: dedupe, conflicts, split
# ---------------------------------------------------------------------------------------------------


def merge_duplicates(keys: list[bytes], counts: np.ndarray) -> tuple[list[bytes], np.ndarray]:
    """Distinct keys in first-seen order with their counts summed."""
    frame = pl.DataFrame({"key": pl.Series(keys, dtype=pl.Binary), "count": counts})
    merged = frame.group_by("key", maintain_order=True).agg(pl.col("count").sum())
    return merged["key"].to_list(), merged["count"].to_numpy()


def split_buckets(keys: list[bytes], seed: int) -> np.ndarray:
    """A stable bucket in [0, 10,000) per key from a seeded xxh3-64 hash."""
    hashes = np.fromiter((xxhash.xxh3_64_intdigest(k, seed) for k in keys), dtype=np.uint64, count=len(keys))
    return (hashes % np.uint64(_SPLIT_BUCKETS)).astype(np.int64)


def _subset(keys: list[bytes], counts: np.ndarray, mask: np.ndarray) -> KeySet:
    picked = np.flatnonzero(mask)
    return KeySet([keys[i] for i in picked], counts[picked])


def training_sample(rows: int, size: int, seed: int) -> np.ndarray:
    """Indices of the training non-members that train, ascending: all `rows` when there are at
    most `size`, else `size` of them drawn uniformly without replacement from a seeded generator."""
    if rows <= size:
        return np.arange(rows)
    return np.sort(np.random.default_rng(seed).choice(rows, size, replace=False))



def sample_keys(keys: KeySet, size: int, seed: int) -> KeySet:
    """At most `size` of the keys, in their order: the sample the model stage would draw from their
    feature rows (`training_sample`), drawn before any feature is computed."""
    if len(keys.keys) <= size:
        return keys
    pick = training_sample(len(keys.keys), size, seed)
    return KeySet([keys.keys[i] for i in pick], keys.counts[pick])


def read_lookup_sample(folder: Path, settings: CorpusSettings, members: set[bytes]) -> tuple[RawSource, dict]:
    """The lookups a folder of sample files holds (tamis.traffic), summed over files and replicas,
    as a source of non-members with counts, and what it held for the report. Looked-up members are
    the service's lookups of members, not label errors: they are removed and counted. Keys no
    build could hold (over max_key_bytes, or not UTF-8 under key_encoding = "utf-8") are never
    members, so they are dropped too, and counted."""
    sample = read_sample_folder(folder, settings.sample_days * 86_400, build_time().timestamp())
    if not sample.files:
        raise BadInput(f"{folder}: none of its {sample.skipped_old} lookup sample files ended within corpus.sample_days = "
                       f"{settings.sample_days:g} days of the build; give a folder the service writes into now, or raise it")
    lengths = np.fromiter(map(len, sample.keys), dtype=np.int64, count=len(sample.keys))
    usable = lengths <= settings.max_key_bytes
    if settings.key_encoding == "utf-8" and _first_invalid_utf8(sample.keys) is not None:
        # one decode of them all finds none in the usual case; only then is each key asked
        usable &= np.fromiter((_first_invalid_utf8([k]) is None for k in sample.keys), dtype=bool, count=len(sample.keys))
    member = np.fromiter((k in members for k in sample.keys), dtype=bool, count=len(sample.keys))
    keep = usable & ~member
    keys = [k for k, kept in zip(sample.keys, keep) if kept]
    report = {
        **sample.as_report(),
        "member_keys": int(member.sum()), "member_lookups": int(sample.counts[member].sum()),
        "unusable_keys": int((~usable).sum()), "unusable_lookups": int(sample.counts[~usable & ~member].sum()),
    }
    return RawSource(keys, sample.counts[keep], len(keys)), report


def conflict_error(labelled: int, example: bytes) -> BadInput:
    """The refusal of keys labelled both member and non-member (corpus.conflicts = "error")."""
    return BadInput(
        f"{labelled} keys are listed as both member and non-member (e.g. {example!r}); fix the labels, or set "
        f"corpus.conflicts = \"member\" to keep them members"
    )


def load_corpus(members_path: Path, non_members_path: Path, settings: CorpusSettings, added: Sequence[bytes] = ()) -> Corpus:
    """The corpus of the two sources; `added` are members recorded since the export (`tamis add`,
    folded in by the build): members whatever the export says, and never non-members. The stats
    count how many of them the export lacks (`added_not_in_export`)."""
    check_sources(members_path, non_members_path)
    members_raw = read_source(members_path, settings, want_counts=False)
    require_members(members_raw.rows, members_path)
    sample = None
    if is_sample_folder(non_members_path):
        non_raw, sample = read_lookup_sample(non_members_path, settings, {*members_raw.keys, *added})
    else:
        non_raw = read_source(non_members_path, settings, want_counts=True)
    require_non_members(non_raw.rows, non_members_path)

    exported = list(dict.fromkeys(members_raw.keys))
    members = exported
    if added:
        known = set(exported)
        members = exported + [key for key in dict.fromkeys(added) if key not in known]
    has_counts = non_raw.counts is not None
    raw_counts = non_raw.counts if has_counts else np.ones(non_raw.rows, dtype=np.int64)
    non_keys, non_counts = merge_duplicates(non_raw.keys, raw_counts)

    member_set = set(members)
    in_members = np.fromiter((k in member_set for k in non_keys), dtype=bool, count=len(non_keys))
    conflicts = int(in_members.sum())
    if conflicts and settings.conflicts == "error":
        # an added member looked up since is no labelling error: only the export's own conflicts are
        exported_set = set(exported) if len(members) > len(exported) else member_set
        labelled_both = [k for k, m in zip(non_keys, in_members) if m and k in exported_set]
        if labelled_both:
            raise conflict_error(len(labelled_both), labelled_both[0])
    if conflicts:
        keep = ~in_members
        non_keys = [k for k, m in zip(non_keys, in_members) if not m]
        non_counts = non_counts[keep]
    stats = {
        "member_rows": members_raw.rows,
        "member_duplicates": members_raw.rows - len(exported),
        "added_not_in_export": len(members) - len(exported),
        "non_member_rows": non_raw.rows,
        "non_member_duplicates": non_raw.rows - len(non_keys) - conflicts,
        "conflicts": conflicts,
        "read": {"by": "driver", "partitions": {"members": len(source_files(members_path)),
                                                 "non_members": 0 if sample else len(source_files(non_members_path))}},
        **({"sample": sample} if sample else {}),
    }
    return split_corpus(members, non_keys, non_counts, has_counts, stats, settings, non_members_path)


def require_members(rows: int, path: Path) -> None:
    if rows == 0:
        raise BadInput(f"{path}: no members; a filter needs at least one key to hold")


def require_non_members(rows: int, path: Path) -> None:
    if rows == 0:
        raise BadInput(f"{path}: no non-members; the false-positive rate cannot be measured without them")


def split_corpus(members: list[bytes], non_keys: list[bytes], non_counts: np.ndarray, has_counts: bool, stats: dict,
                 settings: CorpusSettings, non_members_path: Path) -> Corpus:
    """The corpus of distinct members and of distinct non-members that are not members (in the
    order first seen): heavy keys apart, the light ones split by their seeded hash."""
    if not non_keys:
        raise BadInput(f"{non_members_path}: every non-member is also a member; no non-members are left to measure")
    tau = heavy_cutoff(settings)
    heavy = non_counts >= tau
    bucket = split_buckets(non_keys, settings.split_seed)
    heldout_end = round(settings.heldout_share * _SPLIT_BUCKETS)
    check_end = heldout_end + round(settings.validation_share * _SPLIT_BUCKETS / 2)
    validation_end = heldout_end + round(settings.validation_share * _SPLIT_BUCKETS)
    light = ~heavy
    parts = {
        "heavy": _subset(non_keys, non_counts, heavy),
        "heldout": _subset(non_keys, non_counts, light & (bucket < heldout_end)),
        "check": _subset(non_keys, non_counts, light & (bucket >= heldout_end) & (bucket < check_end)),
        "validation": _subset(non_keys, non_counts, light & (bucket >= check_end) & (bucket < validation_end)),
        "train": _subset(non_keys, non_counts, light & (bucket >= validation_end)),
    }
    # the held-out part's size is judged against the target by the flow; the model needs the others
    for name in ("train", "validation", "check"):
        if not parts[name].keys:
            raise BadInput(
                f"{non_members_path}: the hash split of its {len(non_keys):,} distinct light non-members (looked up "
                f"fewer than tau = {tau:,} times) leaves no {name} keys (corpus.validation_share = "
                f"{settings.validation_share}, heldout_share = {settings.heldout_share}); give more non-members, "
                f"or raise corpus.heavy_count"
            )
    return Corpus(members=members, tau=tau, has_counts=has_counts, stats=stats, **parts)
