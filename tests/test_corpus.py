"""Corpus stage: every source format, validation errors that name the place, dedupe, conflicts, split."""

from pathlib import Path

import numpy as np
import polars as pl
import pytest

from pipeline.config import CorpusSettings
from pipeline.corpus import load_corpus, merge_duplicates, read_source, split_buckets
from pipeline.errors import BadInput

SETTINGS = CorpusSettings()


def _write_lines(path: Path, lines: list[str]) -> Path:
    path.write_text("".join(f"{line}\n" for line in lines), encoding="utf-8")
    return path


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".ndjson", ".txt"])
def test_every_format_reads_the_same_keys_and_counts(tmp_path, suffix):
    frame = pl.DataFrame({"key": ["ash", "birch", "cedar"], "count": [3, 1, 7]})
    path = tmp_path / f"lookups{suffix}"
    if suffix == ".csv":
        frame.write_csv(path)
    elif suffix == ".parquet":
        frame.write_parquet(path)
    elif suffix == ".ndjson":
        frame.write_ndjson(path)
    else:
        _write_lines(path, frame["key"].to_list())
    source = read_source(path, SETTINGS, want_counts=True)
    assert source.keys == [b"ash", b"birch", b"cedar"]
    if suffix == ".txt":
        assert source.counts is None
    else:
        assert source.counts.tolist() == [3, 1, 7]


def test_windows_line_ends_and_a_missing_final_newline(tmp_path):
    path = tmp_path / "keys.txt"
    path.write_bytes(b"one\r\ntwo\r\nthree")
    assert read_source(path, SETTINGS, want_counts=False).keys == [b"one", b"two", b"three"]


@pytest.mark.parametrize(
    "content, message",
    [
        (b"good\n\nbad\n", "line 2 has an empty key"),
        (b"fine\n\xff\xfe\n", "line 2 is not valid UTF-8"),
    ],
)
def test_bad_lines_are_named(tmp_path, content, message):
    path = tmp_path / "keys.txt"
    path.write_bytes(content)
    with pytest.raises(BadInput, match=message):
        read_source(path, SETTINGS, want_counts=False)


def test_raw_bytes_mode_accepts_any_byte_but_newline(tmp_path):
    path = tmp_path / "keys.bin"
    path.write_bytes(b"\xff\xfe\n\x00\x01\n")
    source = read_source(path, CorpusSettings(key_encoding="bytes"), want_counts=False)
    assert source.keys == [b"\xff\xfe", b"\x00\x01"]


@pytest.mark.parametrize("count, shown", [(-1, "-1"), (0, "0"), (1.5, "1.5"), (float("nan"), "nan")])
def test_bad_counts_are_named_with_their_row(tmp_path, count, shown):
    path = tmp_path / "lookups.parquet"
    pl.DataFrame({"key": ["a", "b"], "count": [2.0, count]}).write_parquet(path)
    with pytest.raises(BadInput, match=f"row 2 has count {shown}"):
        read_source(path, SETTINGS, want_counts=True)


def test_missing_column_null_key_overlong_key_and_missing_file(tmp_path):
    table = tmp_path / "t.csv"
    pl.DataFrame({"handle": ["a"]}).write_csv(table)
    with pytest.raises(BadInput, match="no `key` column"):
        read_source(table, SETTINGS, want_counts=True)
    nulls = tmp_path / "n.parquet"
    pl.DataFrame({"key": ["a", None]}).write_parquet(nulls)
    with pytest.raises(BadInput, match="row 2 has no key"):
        read_source(nulls, SETTINGS, want_counts=True)
    long = _write_lines(tmp_path / "long.txt", ["ok", "x" * 20])
    with pytest.raises(BadInput, match="line 2 has a key of 20 bytes"):
        read_source(long, CorpusSettings(max_key_bytes=10), want_counts=False)
    with pytest.raises(BadInput, match="no such file"):
        read_source(tmp_path / "absent.parquet", SETTINGS, want_counts=True)
    with pytest.raises(BadInput, match="cannot read"):
        read_source(tmp_path / "absent.txt", SETTINGS, want_counts=True)


def test_duplicates_merge_with_counts_summed():
    keys, counts = merge_duplicates([b"a", b"b", b"a", b"c", b"b"], np.array([1, 2, 3, 4, 5]))
    assert keys == [b"a", b"b", b"c"]
    assert counts.tolist() == [4, 7, 4]


def test_conflicting_keys_stay_members_or_raise(tmp_path):
    members = _write_lines(tmp_path / "m.txt", ["m1", "m2", "both"])
    non = tmp_path / "n.csv"
    pl.DataFrame({"key": [f"n{i}" for i in range(100)] + ["both"], "count": [1] * 101}).write_csv(non)
    corpus = load_corpus(members, non, SETTINGS)
    everything = corpus.train.keys + corpus.validation.keys + corpus.heldout.keys
    assert b"both" in corpus.members and b"both" not in everything
    assert corpus.stats["conflicts"] == 1 and len(everything) == 100
    with pytest.raises(BadInput, match="both member and non-member"):
        load_corpus(members, non, CorpusSettings(conflicts="error"))


def test_no_members_or_no_non_members_is_refused(tmp_path):
    empty = tmp_path / "empty.txt"
    empty.write_text("")
    some = _write_lines(tmp_path / "some.txt", ["a"])
    with pytest.raises(BadInput, match="no members"):
        load_corpus(empty, some, SETTINGS)
    with pytest.raises(BadInput, match="no non-members"):
        load_corpus(some, empty, SETTINGS)


def test_split_is_stable_disjoint_and_near_its_shares(tmp_path):
    keys = [f"player{i}" for i in range(20000)]
    members = _write_lines(tmp_path / "m.txt", ["bot1"])
    non = _write_lines(tmp_path / "n.txt", keys)
    settings = CorpusSettings(validation_share=0.3, heldout_share=0.2)
    first, second = load_corpus(members, non, settings), load_corpus(members, non, settings)
    assert first.heldout.keys == second.heldout.keys
    parts = [set(first.train.keys), set(first.validation.keys), set(first.heldout.keys)]
    assert sum(map(len, parts)) == 20000 and len(set.union(*parts)) == 20000
    # each key lands in the held-out part with probability 0.2: a 4-sigma binomial band
    sigma = (20000 * 0.2 * 0.8) ** 0.5
    assert abs(len(first.heldout.keys) - 4000) < 4 * sigma
    # the split of a key does not depend on the other keys of the corpus
    assert split_buckets([b"player7"], settings.split_seed)[0] == split_buckets([b"x", b"player7"], settings.split_seed)[1]
