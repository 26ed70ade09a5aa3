"""Corpus stage: read members and non-members, validate them, dedupe, resolve conflicts, split.

Sources are one key a line (any extension but the table ones), or a table: CSV (`.csv`), Parquet
(`.parquet`, `.pq`) or NDJSON (`.ndjson`, `.jsonl`) with a `key` column and, for non-members, an
optional `count` column of lookups. Keys become bytes: UTF-8 of the text unless the corpus is read
with key_encoding = "bytes" (one key a line only, then any byte but newline is allowed).

Non-members are split by a seeded xxh3-64 hash of the key, so a key stays in the same part from one
nightly build to the next (invariant 3): `train` teaches the model, `validation` gives the region
plan its non-member shares, `heldout` only measures the false-positive rate.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
import xxhash

from pipeline.config import CorpusSettings
from pipeline.errors import BadInput

TABLE_SUFFIXES = {".csv": "csv", ".parquet": "parquet", ".pq": "parquet", ".ndjson": "ndjson", ".jsonl": "ndjson"}

# The hash split draws a bucket in [0, 10,000) per key: shares are honoured to 0.01%.
_SPLIT_BUCKETS = 10_000


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
    members: list[bytes]
    train: KeySet
    validation: KeySet
    heldout: KeySet
    has_counts: bool
    stats: dict


@dataclass(frozen=True)
class RawSource:
    keys: list[bytes]
    counts: np.ndarray | None
    rows: int


def _format_of(path: Path) -> str:
    return TABLE_SUFFIXES.get(path.suffix.lower(), "lines")


def _read_lines(path: Path, raw: bytes, encoding: str) -> list[bytes]:
    if encoding == "utf-8":
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            line = raw.count(b"\n", 0, exc.start) + 1
            raise BadInput(
                f"{path}: line {line} is not valid UTF-8 (byte {exc.start}); fix the key, or read keys as raw bytes "
                f"with key_encoding = \"bytes\" (--key-encoding bytes)"
            ) from None
    lines = raw.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    # accept Windows line ends: a key never ends in a carriage return
    return [line[:-1] if line.endswith(b"\r") else line for line in lines]


def _read_table(path: Path, kind: str, want_counts: bool) -> tuple[list[bytes], np.ndarray | None]:
    try:
        if kind == "csv":
            frame = pl.read_csv(path, infer_schema_length=0)  # every column as text; counts parsed below
        elif kind == "parquet":
            frame = pl.read_parquet(path)
        else:
            frame = pl.read_ndjson(path)
    except (pl.exceptions.PolarsError, OSError, ValueError) as exc:
        raise BadInput(f"{path}: cannot read as {kind}: {str(exc).splitlines()[0]}") from None
    if "key" not in frame.columns:
        raise BadInput(f"{path}: no `key` column (columns: {', '.join(frame.columns) or 'none'}); name the key column `key`")
    key_column = frame["key"]
    if key_column.dtype not in (pl.String, pl.Binary):
        raise BadInput(f"{path}: column `key` holds {key_column.dtype}, expected text; write keys as strings")
    nulls = key_column.is_null()
    if nulls.any():
        row = int(nulls.arg_true()[0]) + 1
        raise BadInput(f"{path}: row {row} has no key (null); remove the row or give it a key")
    keys = key_column.cast(pl.Binary).to_list()
    counts = _read_counts(path, frame["count"]) if want_counts and "count" in frame.columns else None
    return keys, counts


def _read_counts(path: Path, column: pl.Series) -> np.ndarray:
    """Lookup counts as int64; each must be a whole number >= 1."""
    values = column.cast(pl.Float64, strict=False)
    bad = values.is_null() | values.is_nan() | (values < 1) | (values != values.floor())
    if bad.any():
        row = int(bad.arg_true()[0])
        raise BadInput(
            f"{path}: row {row + 1} has count {column[row]!r}; counts must be whole numbers >= 1 (drop the row for keys never looked up)"
        )
    return values.cast(pl.Int64).to_numpy()


def read_source(path: Path, settings: CorpusSettings, want_counts: bool) -> RawSource:
    """Keys (and counts) of one source file, checked for empty, over-long and undecodable keys."""
    kind = _format_of(path)
    if kind == "lines":
        try:
            raw = path.read_bytes()
        except OSError as exc:
            raise BadInput(f"cannot read {path}: {exc.strerror}; check the path and its permissions") from None
        keys, counts = _read_lines(path, raw, settings.key_encoding), None
        unit = "line"
    else:
        if not path.is_file():
            raise BadInput(f"cannot read {path}: no such file; check the path")
        if settings.key_encoding == "bytes":
            raise BadInput(f"{path}: key_encoding \"bytes\" applies to one-key-a-line files only; tables hold text keys")
        keys, counts = _read_table(path, kind, want_counts)
        unit = "row"
    lengths = np.fromiter(map(len, keys), dtype=np.int64, count=len(keys))
    if len(keys) and lengths.min() == 0:
        where = int(np.argmin(lengths)) + 1
        raise BadInput(f"{path}: {unit} {where} has an empty key; remove it")
    if len(keys) and lengths.max() > settings.max_key_bytes:
        where = int(np.argmax(lengths)) + 1
        raise BadInput(
            f"{path}: {unit} {where} has a key of {lengths.max()} bytes, over max_key_bytes = {settings.max_key_bytes}; "
            f"raise corpus.max_key_bytes or shorten the key"
        )
    return RawSource(keys, counts, len(keys))


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


def load_corpus(members_path: Path, non_members_path: Path, settings: CorpusSettings) -> Corpus:
    members_raw = read_source(members_path, settings, want_counts=False)
    non_raw = read_source(non_members_path, settings, want_counts=True)
    if members_raw.rows == 0:
        raise BadInput(f"{members_path}: no members; a filter needs at least one key to hold")
    if non_raw.rows == 0:
        raise BadInput(f"{non_members_path}: no non-members; the false-positive rate cannot be measured without them")

    members = list(dict.fromkeys(members_raw.keys))
    has_counts = non_raw.counts is not None
    raw_counts = non_raw.counts if has_counts else np.ones(non_raw.rows, dtype=np.int64)
    non_keys, non_counts = merge_duplicates(non_raw.keys, raw_counts)

    member_set = set(members)
    in_members = np.fromiter((k in member_set for k in non_keys), dtype=bool, count=len(non_keys))
    conflicts = int(in_members.sum())
    if conflicts and settings.conflicts == "error":
        example = non_keys[int(np.argmax(in_members))]
        raise BadInput(
            f"{conflicts} keys are listed as both member and non-member (e.g. {example!r}); fix the labels, "
            f"or set corpus.conflicts = \"member\" to keep them members"
        )
    if conflicts:
        keep = ~in_members
        non_keys = [k for k, m in zip(non_keys, in_members) if not m]
        non_counts = non_counts[keep]
    if not non_keys:
        raise BadInput(f"{non_members_path}: every non-member is also a member; no non-members are left to measure")

    bucket = split_buckets(non_keys, settings.split_seed)
    heldout_end = round(settings.heldout_share * _SPLIT_BUCKETS)
    validation_end = heldout_end + round(settings.validation_share * _SPLIT_BUCKETS)
    stats = {
        "member_rows": members_raw.rows,
        "member_duplicates": members_raw.rows - len(members),
        "non_member_rows": non_raw.rows,
        "non_member_duplicates": non_raw.rows - len(non_keys) - conflicts,
        "conflicts": conflicts,
    }
    return Corpus(
        members=members,
        heldout=_subset(non_keys, non_counts, bucket < heldout_end),
        validation=_subset(non_keys, non_counts, (bucket >= heldout_end) & (bucket < validation_end)),
        train=_subset(non_keys, non_counts, bucket >= validation_end),
        has_counts=has_counts,
        stats=stats,
    )
