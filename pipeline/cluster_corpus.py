"""The corpus stage on a Dask cluster: the workers read the partitions, the driver only lists them.

Each partition is read and validated on a worker (`tamis.corpus.read_file`: the same checks, the
same messages naming the file and the place). The worker deals its keys into B buckets by an xxh3
hash of the key, so that every copy of a key, from whichever partition of whichever side, lands in
the same bucket: dedupe (a key in two partitions is one key, its counts summed) and conflicts (a
key on both sides) are then exact within each bucket, and a bucket is merged on one worker from its
pieces, which move worker to worker, never through the driver.

Every key carries its place, partition index times 2^40 plus its row, and a bucket keeps each key's
first place. The driver gathers the merged buckets and orders their keys by place: the result is
exactly the corpus `tamis.corpus.load_corpus` reads from the same partitions on one machine (same
keys, same order, same counts, same split), whatever B and however the partitions were spread.
What the driver holds is then the distinct keys (not the raw rows of the partitions, nor their
duplicates); the report's `corpus.read` says how many and their bytes.
"""

from __future__ import annotations

import operator
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl
import xxhash

from tamis.config import CorpusSettings
from tamis.corpus import (
    Corpus,
    RawSource,
    check_sources,
    conflict_error,
    counted_partitions,
    load_corpus,
    read_file,
    require_members,
    require_non_members,
    source_files,
    split_corpus,
)
from tamis.traffic import is_sample_folder

# A key's place is partition * 2^40 + row: no partition holds 2^40 (a trillion) rows, and a
# million partitions still fit in an int64.
ROW_BITS = 40

# The seed of the bucket hash; distinct from any split seed a config sets, so buckets and the
# hash split are unrelated.
BUCKET_SEED = 0x7A11

# Buckets per worker: a few, so that one slow bucket does not hold up the stage.
BUCKETS_PER_WORKER = 2


@dataclass(frozen=True)
class Piece:
    """The keys of one partition that fall in one bucket, with their places (and counts)."""

    keys: list[bytes]
    places: np.ndarray
    counts: np.ndarray | None


@dataclass(frozen=True)
class BucketCorpus:
    """One bucket merged: its distinct members and its distinct non-members that are not members,
    each with its first place; what its conflicts were."""

    members: list[bytes]
    member_places: np.ndarray
    non_keys: list[bytes]
    non_counts: np.ndarray
    non_places: np.ndarray
    conflicts: int
    labelled_both: int  # conflicts among the exported members (the added ones are no label errors)
    first_labelled: tuple[int, bytes] | None  # the place and key of the first of them


def bucket_of(keys: Sequence[bytes], buckets: int) -> np.ndarray:
    hashes = np.fromiter((xxhash.xxh3_64_intdigest(key, BUCKET_SEED) for key in keys), dtype=np.uint64, count=len(keys))
    return (hashes % np.uint64(buckets)).astype(np.int64)


def deal(keys: list[bytes], counts: np.ndarray | None, first_place: int, buckets: int) -> list[Piece]:
    """Keys (numbered from `first_place`) dealt into their buckets, in their order within each."""
    places = first_place + np.arange(len(keys), dtype=np.int64)
    bucket = bucket_of(keys, buckets)
    pieces = []
    for b in range(buckets):
        picked = np.flatnonzero(bucket == b)
        pieces.append(Piece([keys[i] for i in picked], places[picked], None if counts is None else counts[picked]))
    return pieces


def read_partition(path: Path, index: int, settings: CorpusSettings, want_counts: bool, buckets: int) -> tuple[RawSource, list[Piece]]:
    """On a worker: one partition read and checked, dealt into buckets. The RawSource returned
    holds no keys (rows and whether counts were found are all the driver needs of it)."""
    source = read_file(path, settings, want_counts)
    pieces = deal(source.keys, source.counts, index << ROW_BITS, buckets)
    counts = None if source.counts is None else source.counts[:0]
    return RawSource([], counts, source.rows), pieces


def _distinct(pieces: Sequence[Piece]) -> pl.DataFrame:
    """Distinct keys of some pieces (given in place order) with their first place and summed count."""
    frame = pl.DataFrame(
        {
            "key": pl.Series([key for piece in pieces for key in piece.keys], dtype=pl.Binary),
            "place": np.concatenate([piece.places for piece in pieces] or [np.zeros(0, np.int64)]),
            "count": np.concatenate([np.ones(len(p.keys), np.int64) if p.counts is None else p.counts for p in pieces] or [np.zeros(0, np.int64)]),
        }
    )
    return frame.group_by("key", maintain_order=True).agg(pl.col("place").first(), pl.col("count").sum())


def bucket_piece(read: tuple[RawSource, list[Piece]], bucket: int) -> Piece:
    """On a worker: one bucket's piece of a partition read there."""
    return read[1][bucket]


def merge_bucket(member_pieces: list[Piece], non_pieces: list[Piece], added: Piece, exported_end: int) -> BucketCorpus:
    """On a worker: one bucket's pieces merged. Members of places below `exported_end` come from
    the export, the `added` ones after it. Non-members that are members are conflicts: counted,
    removed, and the first export-labelled one kept for the message (corpus.conflicts = "error")."""
    members = _distinct([*member_pieces, added])
    non = _distinct(non_pieces)
    conflict = non["key"].is_in(members["key"])
    exported = members.filter(pl.col("place") < exported_end)["key"]
    labelled = non.filter(conflict & non["key"].is_in(exported))
    first = (int(labelled["place"][0]), labelled["key"][0]) if labelled.height else None
    kept = non.filter(~conflict)
    return BucketCorpus(
        members=members["key"].to_list(),
        member_places=members["place"].to_numpy(),
        non_keys=kept["key"].to_list(),
        non_counts=kept["count"].to_numpy(),
        non_places=kept["place"].to_numpy(),
        conflicts=int(conflict.sum()),
        labelled_both=labelled.height,
        first_labelled=first,
    )


def _in_place_order(keys: list[list[bytes]], places: list[np.ndarray], *columns: list[np.ndarray]) -> tuple:
    """The buckets' keys (and columns) joined and ordered by place."""
    order = np.argsort(np.concatenate(places), kind="stable")
    joined = [key for part in keys for key in part]
    return ([joined[i] for i in order], *(np.concatenate(column)[order] for column in columns))


def load_corpus_on_cluster(client, members_path: Path, non_members_path: Path, settings: CorpusSettings,
                           added: Sequence[bytes] = ()) -> Corpus:
    """`tamis.corpus.load_corpus` with the partitions read, checked, deduplicated and their
    conflicts found on the workers of `client` (a distributed.Client). The same corpus as a local
    read; stats' `read` says where it was read, in how many buckets, and what the driver held."""
    if is_sample_folder(non_members_path):  # a service's few sample files, read where the build runs
        return load_corpus(members_path, non_members_path, settings, added)
    check_sources(members_path, non_members_path)  # file sizes and a first MiB only
    member_files, non_files = source_files(members_path), source_files(non_members_path)
    workers = max(1, len(client.scheduler_info()["workers"]))
    buckets = BUCKETS_PER_WORKER * workers
    read_members = [client.submit(read_partition, path, index, settings, False, buckets, pure=False)
                    for index, path in enumerate(member_files)]
    read_non = [client.submit(read_partition, path, index, settings, True, buckets, pure=False)
                for index, path in enumerate(non_files)]
    member_heads = client.gather([client.submit(operator.itemgetter(0), read) for read in read_members])
    non_heads = client.gather([client.submit(operator.itemgetter(0), read) for read in read_non])
    member_rows, non_rows = sum(head.rows for head in member_heads), sum(head.rows for head in non_heads)
    require_members(member_rows, members_path)
    require_non_members(non_rows, non_members_path)
    has_counts = counted_partitions(non_members_path, list(zip(non_files, non_heads)))

    exported_end = len(member_files) << ROW_BITS
    added_pieces = deal(list(dict.fromkeys(added)), None, exported_end, buckets)

    def pieces(reads: list, b: int) -> list:
        return [client.submit(bucket_piece, read, b) for read in reads]

    merged = [client.submit(merge_bucket, pieces(read_members, b), pieces(read_non, b), added_pieces[b], exported_end)
              for b in range(buckets)]
    parts: list[BucketCorpus] = client.gather(merged)
    labelled = sum(part.labelled_both for part in parts)
    if labelled and settings.conflicts == "error":
        raise conflict_error(labelled, min(part.first_labelled for part in parts if part.first_labelled)[1])
    members, member_places = _in_place_order([p.members for p in parts], [p.member_places for p in parts],
                                               [p.member_places for p in parts])
    non_keys, non_counts = _in_place_order([p.non_keys for p in parts], [p.non_places for p in parts],
                                           [p.non_counts for p in parts])
    conflicts = sum(part.conflicts for part in parts)
    exported = int(np.count_nonzero(member_places < exported_end))
    stats = {
        "member_rows": member_rows,
        "member_duplicates": member_rows - exported,
        "added_not_in_export": len(members) - exported,
        "non_member_rows": non_rows,
        "non_member_duplicates": non_rows - len(non_keys) - conflicts,
        "conflicts": conflicts,
        "read": {
            "by": "workers",
            "partitions": {"members": len(member_files), "non_members": len(non_files)},
            "buckets": buckets,
            # what the driver held of the corpus: the distinct keys, gathered from the buckets
            "driver_keys": len(members) + len(non_keys),
            "driver_key_bytes": sum(map(len, members)) + sum(map(len, non_keys)),
        },
    }
    return split_corpus(members, non_keys, non_counts.astype(np.int64), has_counts, stats, settings, non_members_path)
