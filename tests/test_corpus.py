"""Corpus stage: every source format, validation errors that name the file, the place and the fix,
dedupe, conflicts, split, and the memory estimate made before reading."""

import errno
import os
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from tamis.config import CorpusSettings
from tamis.corpus import (
    BUILD_BASE_BYTES,
    BUILD_BYTES_PER_KEY,
    MEMORY_LIMIT_ENV,
    KeySet,
    available_memory,
    estimate_build_memory,
    estimate_rows,
    load_corpus,
    merge_duplicates,
    read_source,
    sample_keys,
    split_buckets,
    training_sample,
)
from tamis.errors import BadInput

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


def test_raw_bytes_mode_never_changes_a_key_and_refuses_a_line_ending_in_a_carriage_return(tmp_path):
    inside = _write(tmp_path / "inside.bin", b"a\rb\n\r\x00\n")
    assert read_source(inside, CorpusSettings(key_encoding="bytes"), want_counts=False).keys == [b"a\rb", b"\r\x00"]
    # a key's last byte 0x0D and a Windows line end look alike in a line file: refused, never stripped
    for content, line in [(b"ok\nends_in_cr\r\nok2\n", 2), (b"ok\nlast\r", 2), (b"first\r\n", 1)]:
        path = _write(tmp_path / "cr.bin", content)
        with pytest.raises(BadInput, match=rf"cr.bin: line {line} ends in a carriage return .*convert them to LF"):
            read_source(path, CorpusSettings(key_encoding="bytes"), want_counts=False)


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


# --- which columns are read --------------------------------------------------------------------


def _table(path: Path, frame: dict) -> Path:
    {".csv": pl.DataFrame(frame).write_csv, ".parquet": pl.DataFrame(frame).write_parquet,
     ".ndjson": pl.DataFrame(frame).write_ndjson}[path.suffix](path)
    return path


@pytest.mark.parametrize("suffix", [".csv", ".parquet", ".ndjson"])
def test_counts_under_another_name_are_refused_until_named(tmp_path, suffix):
    path = _table(tmp_path / f"lookups{suffix}", {"key": ["ash", "birch"], "lookups": [3, 1]})
    with pytest.raises(BadInput) as refused:
        read_source(path, SETTINGS, want_counts=True)
    said = str(refused.value)
    assert "no `count` column, but column `lookups` holds numbers" in said
    assert "--count-column lookups" in said and "--count-column ''" in said
    named = read_source(path, CorpusSettings(count_column="lookups"), want_counts=True)
    assert named.keys == [b"ash", b"birch"] and named.counts.tolist() == [3, 1]
    uncounted = read_source(path, CorpusSettings(count_column=""), want_counts=True)
    assert uncounted.keys == [b"ash", b"birch"] and uncounted.counts is None


def test_a_column_that_holds_no_numbers_is_no_count_column(tmp_path):
    path = _table(tmp_path / "lookups.csv", {"key": ["ash", "birch"], "note": ["kept", "12a"]})
    source = read_source(path, SETTINGS, want_counts=True)
    assert source.keys == [b"ash", b"birch"] and source.counts is None
    # the members' table is read for its keys only: other columns do not matter there
    counted = _table(tmp_path / "members.csv", {"key": ["ash"], "lookups": [3]})
    assert read_source(counted, SETTINGS, want_counts=False).keys == [b"ash"]


def test_a_named_count_column_that_is_missing_is_refused(tmp_path):
    path = _table(tmp_path / "lookups.parquet", {"key": ["ash"], "count": [3]})
    with pytest.raises(BadInput, match=r"no `hits` column for the lookup counts \(columns: key, count\).*--count-column NAME"):
        read_source(path, CorpusSettings(count_column="hits"), want_counts=True)


def test_a_key_column_of_another_name_is_read_when_named(tmp_path):
    path = _table(tmp_path / "lookups.ndjson", {"handle": ["ash", "birch"], "count": [2, 5]})
    with pytest.raises(BadInput, match=r"no `key` column \(columns: handle, count\).*--key-column NAME"):
        read_source(path, SETTINGS, want_counts=True)
    source = read_source(path, CorpusSettings(key_column="handle"), want_counts=True)
    assert source.keys == [b"ash", b"birch"] and source.counts.tolist() == [2, 5]
    with pytest.raises(ValueError, match="must be different columns"):
        CorpusSettings(key_column="count")


def test_a_column_name_given_twice_is_refused(tmp_path):
    csv_path = tmp_path / "twice.csv"
    csv_path.write_text("key,key,count\nash,birch,1\n")
    with pytest.raises(BadInput, match=r"`key` is given twice \(columns: key, key, count\).*own name"):
        read_source(csv_path, SETTINGS, want_counts=True)
    ndjson_path = tmp_path / "twice.ndjson"
    ndjson_path.write_text('{"key": "ash", "count": 1}\n{"key": "ash", "key": "birch", "count": 2}\n')
    with pytest.raises(BadInput, match=r"`key` is given twice in one object"):
        read_source(ndjson_path, SETTINGS, want_counts=True)


def test_duplicates_merge_with_counts_summed():
    keys, counts = merge_duplicates([b"a", b"b", b"a", b"c", b"b"], np.array([1, 2, 3, 4, 5]))
    assert keys == [b"a", b"b", b"c"]
    assert counts.tolist() == [4, 7, 4]


def test_conflicting_keys_stay_members_or_raise(tmp_path):
    members = _write_lines(tmp_path / "m.txt", ["m1", "m2", "both"])
    non = tmp_path / "n.csv"
    pl.DataFrame({"key": [f"n{i}" for i in range(100)] + ["both"], "count": [1] * 101}).write_csv(non)
    corpus = load_corpus(members, non, SETTINGS)
    everything = [key for part in corpus.non_member_parts for key in part.keys]
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
    parts = [set(part.keys) for part in first.non_member_parts]
    assert sum(map(len, parts)) == 20000 and len(set.union(*parts)) == 20000
    assert not first.heavy.keys  # no counts: every key is light
    # each key lands in the held-out part with probability 0.2, and in the validation and check
    # parts with 0.15 each: 4-sigma binomial bands
    for part, share in ((first.heldout, 0.2), (first.validation, 0.15), (first.check, 0.15)):
        sigma = (20000 * share * (1 - share)) ** 0.5
        assert abs(len(part.keys) - 20000 * share) < 4 * sigma
    # the split of a key does not depend on the other keys of the corpus
    assert split_buckets([b"player7"], settings.split_seed)[0] == split_buckets([b"x", b"player7"], settings.split_seed)[1]


# --- every message names the file, the place and the fix ---------------------------------------------


def _write(path: Path, content) -> Path:
    if callable(content):
        content(path)
    else:
        path.write_bytes(content)
    return path


def _binary_keys(path: Path) -> None:
    pl.DataFrame({"key": pl.Series([b"ok", b"\xff\xfe"], dtype=pl.Binary)}).write_parquet(path)


@pytest.mark.parametrize(
    "name, content, message",
    [
        ("quote.csv", b'key,count\nok,1\n"open,2\nnext,3\n', r"line 3: a quoted field opened here is never closed; close the quote"),
        ("stray.csv", b'key,count\nok,1\n"ab"c,2\n', r"line 3: .*quote the whole field"),
        ("ragged.csv", b"key,count\nok,1\nx,y,2\n", r"line 3 has 3 fields where the header has 2"),
        ("latin.csv", b"key,count\nok,1\ncaf\xe9,2\n", r"line 3 is not valid UTF-8 .*key_encoding = \"bytes\""),
        ("broken.ndjson", b'{"key": "a"}\n\n{"key": \n', r"line 3 is not valid JSON"),
        ("list.ndjson", b'{"key": "a"}\n[1, 2]\n', r"line 2 holds a JSON list, not an object"),
        ("latin.ndjson", b'{"key": "a"}\n{"key": "\xff"}\n', r"line 2 is not valid UTF-8"),
        ("fake.parquet", b"key\na\n", r"not a readable Parquet file .*real format"),
        ("blank.csv", b"key,count\na,1\n,2\n", r"row 2 \(line 3\) has no key"),
        ("gap.ndjson", b'{"key": "a"}\n\n{"count": 2}\n', r"line 3 has no key"),
        ("raw.parquet", _binary_keys, r"row 2 holds a key that is not valid UTF-8; .*key_encoding = \"bytes\""),
        ("ints.ndjson", b'{"key": 1}\n', r"column `key` holds Int64, expected text"),
        ("text.csv", b"key,count\na,1\nb,many\n", r"row 2 \(line 3\) has count 'many'"),
        ("huge.csv", b"key,count\na,1\nb,1e20\n", r"row 2 \(line 3\) has count '1e20'; counts must be whole numbers from 1 to 2\^53"),
        ("inf.csv", b"key,count\na,inf\n", r"row 1 \(line 2\) has count 'inf'"),
        ("flag.ndjson", b'{"key": "a", "count": true}\n', r"column `count` holds Boolean"),
        ("empty.csv", b'key,count\na,1\n"",2\n', r"row 2 \(line 3\) has an empty key"),
    ],
)
def test_table_problems_are_named_with_their_line_or_row(tmp_path, name, content, message):
    path = _write(tmp_path / name, content)
    with pytest.raises(BadInput, match=message) as raised:
        read_source(path, SETTINGS, want_counts=True)
    text = str(raised.value)
    assert text.startswith(str(path)) and "\n" not in text


def test_an_ndjson_place_counts_the_blank_lines_polars_skips(tmp_path):
    path = _write(tmp_path / "gaps.ndjson", b'{"key": "a", "count": 1}\n\n\n{"key": "b", "count": 0}\n')
    with pytest.raises(BadInput, match="line 4 has count 0"):
        read_source(path, SETTINGS, want_counts=True)


def test_raw_bytes_mode_reads_parquet_binary_keys_and_refuses_text_tables(tmp_path):
    path = _write(tmp_path / "raw.parquet", _binary_keys)
    assert read_source(path, CorpusSettings(key_encoding="bytes"), want_counts=False).keys == [b"ok", b"\xff\xfe"]
    csv_path = _write(tmp_path / "plain.csv", b"key\na\n")
    with pytest.raises(BadInput, match='key_encoding "bytes" reads one-key-a-line files and Parquet'):
        read_source(csv_path, CorpusSettings(key_encoding="bytes"), want_counts=False)


def test_a_byte_order_mark_is_not_part_of_the_first_key(tmp_path):
    path = _write(tmp_path / "bom.txt", b"\xef\xbb\xbffirst\nsecond\n")
    assert read_source(path, SETTINGS, want_counts=False).keys == [b"first", b"second"]
    raw = read_source(path, CorpusSettings(key_encoding="bytes"), want_counts=False)
    assert raw.keys[0] == b"\xef\xbb\xbffirst", "raw bytes are taken as they are"


@pytest.mark.parametrize("suffix", [".txt", ".csv", ".parquet", ".ndjson"])
def test_an_empty_file_holds_no_keys(tmp_path, suffix):
    path = _write(tmp_path / f"empty{suffix}", b"")
    assert read_source(path, SETTINGS, want_counts=True).rows == 0


def test_a_folder_and_a_path_through_a_file_are_named(tmp_path):
    folder = tmp_path / "folder.csv"
    folder.mkdir()
    with pytest.raises(BadInput, match="is a folder holding no key files"):
        read_source(folder, SETTINGS, want_counts=True)
    afile = _write(tmp_path / "afile", b"x\n")
    with pytest.raises(BadInput, match="a part of the path is a file"):
        read_source(afile / "keys.txt", SETTINGS, want_counts=True)


def test_an_unreadable_file_is_named(tmp_path, monkeypatch):
    # the error open() raises on a file of mode 0 for any user but root (EACCES), raised for every
    # user so that the test runs under CI, which runs as root and reads a file whatever its mode
    path = _write(tmp_path / "locked.txt", b"a\n")
    real_open = open

    def locked(file, *args, **kwargs):
        if Path(file) == path:
            raise PermissionError(errno.EACCES, "Permission denied", str(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr("builtins.open", locked)
    with pytest.raises(BadInput, match="permission denied; make the file readable") as raised:
        read_source(path, SETTINGS, want_counts=False)
    assert str(path) in str(raised.value)


def test_an_io_error_that_may_clear_is_not_bad_input(tmp_path, monkeypatch):
    # EIO (a network filesystem's hiccup, say) propagates as OSError, for the flow to retry
    path = _write(tmp_path / "keys.txt", b"a\n")
    real_open = open

    def flaky(file, *args, **kwargs):
        if Path(file) == path:
            raise OSError(errno.EIO, "Input/output error")
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr("builtins.open", flaky)
    with pytest.raises(OSError) as raised:
        read_source(path, SETTINGS, want_counts=False)
    assert not isinstance(raised.value, BadInput) and raised.value.errno == errno.EIO


def test_a_split_that_leaves_no_training_or_validation_keys_is_refused(tmp_path):
    members = _write_lines(tmp_path / "m.txt", ["bot1"])
    # with the default seed, "alpha" falls in the held-out part and "beta" in validation
    non = _write_lines(tmp_path / "n.txt", ["alpha", "beta"])
    with pytest.raises(BadInput, match=r"leaves no train keys .*give more non-members"):
        load_corpus(members, non, SETTINGS)


def test_duplicates_and_conflicts_are_counted_in_the_stats(tmp_path):
    members = _write_lines(tmp_path / "m.txt", ["m1", "m2", "m1", "both"])
    non = tmp_path / "n.csv"
    keys = [f"n{i}" for i in range(200)]
    pl.DataFrame({"key": keys + ["n1", "n1", "both", "both"], "count": [1] * 200 + [4, 5, 2, 3]}).write_csv(non)
    corpus = load_corpus(members, non, SETTINGS)
    assert corpus.stats == {"member_rows": 4, "member_duplicates": 1, "non_member_rows": 204,
                            "non_member_duplicates": 3, "conflicts": 1, "added_not_in_export": 0,
                            "read": {"by": "driver", "partitions": {"members": 1, "non_members": 1}}}
    parts = corpus.non_member_parts
    counts = {k: int(c) for part in parts for k, c in zip(part.keys, part.counts)}
    assert counts[b"n1"] == 1 + 4 + 5 and b"both" not in counts and len(counts) == 200


# --- memory, estimated before reading ----------------------------------------------------------------


def test_rows_are_estimated_from_a_sample_and_parquet_metadata(tmp_path):
    lines = _write_lines(tmp_path / "keys.txt", [f"key{i:06d}" for i in range(300_000)])  # 3.3 MB: sampled
    assert abs(estimate_rows(lines) - 300_000) <= 300_000 * 0.01
    table = tmp_path / "keys.parquet"
    pl.DataFrame({"key": [f"k{i}" for i in range(12_345)]}).write_parquet(table)
    assert estimate_rows(table) == 12_345
    assert estimate_rows(_write(tmp_path / "one.txt", b"no newline at the end")) == 1
    assert estimate_rows(_write(tmp_path / "none.txt", b"")) == 0


def test_the_estimate_counts_the_keys_of_every_source(tmp_path):
    lines = _write_lines(tmp_path / "members.txt", ["k" * 10] * 1000)
    table = tmp_path / "lookups.parquet"
    pl.DataFrame({"key": [f"n{i}" for i in range(500)], "count": [1] * 500}).write_parquet(table)
    estimate = estimate_build_memory([lines, table])
    assert estimate.keys == 1500
    assert estimate.needed_bytes == BUILD_BASE_BYTES + 1500 * BUILD_BYTES_PER_KEY


def test_a_corpus_too_large_for_memory_is_refused_before_any_key_is_read(tmp_path, monkeypatch):
    members = _write_lines(tmp_path / "m.txt", ["a", "b"])
    non = _write_lines(tmp_path / "n.txt", [f"n{i}" for i in range(100)])
    monkeypatch.setenv(MEMORY_LIMIT_ENV, "100M")
    monkeypatch.setattr("tamis.corpus.read_source", lambda *args: pytest.fail("a key was read"))
    with pytest.raises(BadInput, match=r"needs about 0\.9 GiB .*more than the 0\.1 GiB of memory available") as raised:
        load_corpus(members, non, SETTINGS)
    assert str(members) in str(raised.value) and MEMORY_LIMIT_ENV in str(raised.value)


@pytest.mark.parametrize("text, expected", [("1024", 1024), ("8G", 8 << 30), ("512 MiB", 512 << 20), ("2t", 2 << 40)])
def test_the_memory_limit_reads_sizes(monkeypatch, text, expected):
    monkeypatch.setenv(MEMORY_LIMIT_ENV, text)
    assert available_memory() == expected


def test_a_memory_limit_that_is_not_a_size_is_refused(monkeypatch):
    monkeypatch.setenv(MEMORY_LIMIT_ENV, "plenty")
    with pytest.raises(BadInput, match="is not a size"):
        available_memory()


def test_available_memory_without_a_limit_is_what_the_system_reports(monkeypatch):
    monkeypatch.delenv(MEMORY_LIMIT_ENV, raising=False)
    physical = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    assert 0 < available_memory() <= physical


def test_the_training_sample_is_drawn_once_the_same_way_from_keys_or_rows():
    keys = KeySet([b"k%d" % i for i in range(1000)], np.arange(1000, dtype=np.int64) + 1)
    sample = sample_keys(keys, 100, seed=4)
    pick = training_sample(1000, 100, seed=4)
    assert sample.keys == [keys.keys[i] for i in pick] and np.array_equal(sample.counts, keys.counts[pick])
    assert len(set(sample.keys)) == 100 and list(pick) == sorted(pick)
    assert sample_keys(keys, 1000, seed=4) is keys


# --- partitioned sources ------------------------------------------------------------------------------


def _partitioned(tmp_path: Path, members: int = 400, non_members: int = 3000) -> dict:
    """One members file and one lookups table, and the same rows cut into partitions: members in
    three one-key-a-line files, lookups in four Parquet files, with a writer's marker beside them."""
    from tamis.demo import write_demo_corpus

    members_path, lookups_path = write_demo_corpus(tmp_path / "whole", members=members, non_members=non_members, seed=5)
    lines = members_path.read_bytes().splitlines(keepends=True)
    lookups = pl.read_parquet(lookups_path)
    lookups = pl.concat([lookups, lookups.head(50)])  # keys repeated across partitions: one key each, counts summed
    member_parts, lookup_parts = tmp_path / "members", tmp_path / "lookups"
    member_parts.mkdir()
    lookup_parts.mkdir()
    for i in range(3):
        (member_parts / f"part-{i}.txt").write_bytes(b"".join(lines[i::3]) + lines[i])  # and a duplicate of its own
    cut = np.linspace(0, lookups.height, 5).astype(int)
    for i in range(4):
        lookups.slice(cut[i], cut[i + 1] - cut[i]).write_parquet(lookup_parts / f"part-{i}.parquet")
    (lookup_parts / "_SUCCESS").write_bytes(b"")
    whole_members = tmp_path / "members.txt"
    whole_members.write_bytes(b"".join((member_parts / f"part-{i}.txt").read_bytes() for i in range(3)))
    whole_lookups = tmp_path / "lookups.parquet"
    lookups.write_parquet(whole_lookups)
    return {"members": member_parts, "lookups": lookup_parts, "whole_members": whole_members, "whole_lookups": whole_lookups}


def assert_same_corpus(first, second) -> None:
    assert first.members == second.members
    for name in ("heavy", "train", "validation", "check", "heldout"):
        assert getattr(first, name).keys == getattr(second, name).keys, name
        assert np.array_equal(getattr(first, name).counts, getattr(second, name).counts), name
    assert (first.tau, first.has_counts) == (second.tau, second.has_counts)
    assert {k: v for k, v in first.stats.items() if k != "read"} == {k: v for k, v in second.stats.items() if k != "read"}


def test_a_folder_of_partitions_gives_the_corpus_of_its_files_joined(tmp_path):
    paths = _partitioned(tmp_path)
    parted = load_corpus(paths["members"], paths["lookups"], SETTINGS)
    whole = load_corpus(paths["whole_members"], paths["whole_lookups"], SETTINGS)
    assert_same_corpus(parted, whole)
    assert parted.stats["read"]["partitions"] == {"members": 3, "non_members": 4}  # the marker file is no partition
    assert parted.stats["member_duplicates"] == 3 and parted.stats["non_member_duplicates"] >= 50
    globbed = load_corpus(paths["members"] / "part-*.txt", paths["lookups"] / "*.parquet", SETTINGS)
    assert_same_corpus(globbed, whole)


def test_partitions_that_cannot_be_used_are_named(tmp_path):
    paths = _partitioned(tmp_path)
    with pytest.raises(BadInput, match=r"no file matches .*nothing-\*\.parquet"):
        load_corpus(paths["members"], paths["lookups"] / "nothing-*.parquet", SETTINGS)
    pl.DataFrame({"key": ["uncounted"]}).write_parquet(paths["lookups"] / "part-9.parquet")
    with pytest.raises(BadInput, match=r"partition .*part-9.parquet has no count column while .*part-0.parquet has one"):
        load_corpus(paths["members"], paths["lookups"], SETTINGS)
    (paths["lookups"] / "part-9.parquet").unlink()
    (paths["members"] / "nested").mkdir()
    with pytest.raises(BadInput, match=r"nested: a folder inside the partitions of"):
        load_corpus(paths["members"], paths["lookups"], SETTINGS)
    (paths["members"] / "nested").rmdir()
    (paths["members"] / "part-1.txt").write_bytes(b"fine\n\nempty line above\n")
    with pytest.raises(BadInput, match=r"part-1.txt: line 2"):
        load_corpus(paths["members"], paths["lookups"], SETTINGS)


def test_a_lookup_sample_leaves_out_members_and_keys_no_build_can_hold(tmp_path):
    """Lookups of members are the service's, not label errors; keys over max_key_bytes or not
    UTF-8 can never be members: all are left out of the non-members, and counted."""
    import numpy as np

    from tamis.corpus import read_lookup_sample
    from tamis.traffic import Served, TrafficRecorder

    keys = [b"player", b"player", b"banned", b"\xff\xfe", b"x" * (SETTINGS.max_key_bytes + 1), b"other"]
    recorder = TrafficRecorder(tmp_path, 1.0)
    recorder.record(Served("b", 1, 0.01, 0.02, 0.02), keys, np.zeros(len(keys), dtype=bool))
    recorder.flush()
    source, report = read_lookup_sample(tmp_path, SETTINGS, {b"banned"})
    assert dict(zip(source.keys, source.counts.tolist())) == {b"player": 2, b"other": 1}
    assert (report["member_keys"], report["member_lookups"]) == (1, 1)
    assert (report["unusable_keys"], report["unusable_lookups"]) == (2, 2)
