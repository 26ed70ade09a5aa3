"""Bad input through the command line: every case exits 2 with one line on stderr that names the
file, the place and the fix, and leaves the store exactly as it was. Input that is odd but usable
(duplicates, a key on both lists, raw bytes read as bytes) builds, and the report counts it.

The cases run in one process per group (tests/cli_runner.py) through `tamis.cli.main`, as the
console script does, with their stdout and stderr caught at the file descriptors. The early group
(the config and the command line) ends before a build starts and runs with the fast tests; the
others run inside the build flow, cost Prefect's start and about 1.3 s of its overhead each, and
run with the slow ones (tests/test_corpus.py checks each corpus message at the stage, fast)."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

import polars as pl
import pytest

from tamis import publish
from tamis.corpus import MEMORY_LIMIT_ENV
from tamis.loader import open_filter
from tamis_testing import SMALL_CONFIG_TOML, snapshot, write_lines, write_small_corpus

TESTS = Path(__file__).resolve().parent
TARGET = "0.05"
IS_ROOT = os.geteuid() == 0


@dataclass(frozen=True)
class Case:
    """One command line. `members` / `non_members`: a file name under the case's folder, or None
    for the good corpus; `files`: what to write there first (bytes, or a function of the path);
    `config`: TOML added to the small-model config; `says`: fragments the one stderr line must
    hold; `code`: the exit code."""

    name: str
    members: str | None = None
    non_members: str | None = None
    files: dict = field(default_factory=dict)
    config: str = ""
    extra: tuple[str, ...] = ()
    env: dict = field(default_factory=dict)
    says: tuple[str, ...] = ()
    code: int = 2
    store_is_a_file: bool = False
    early: bool = False  # refused while the command line and its config are read, before a build starts


def parquet(frame: dict):
    return lambda path: pl.DataFrame(frame).write_parquet(path)


def csv_text(text: str) -> bytes:
    return text.encode("utf-8")


BAD = [
    Case("missing file", members="absent.txt", says=("absent.txt", "no such file", "check the path")),
    Case("missing table", non_members="absent.parquet", says=("absent.parquet", "no such file")),
    Case("an empty folder", members="a_folder", files={"a_folder": "folder"}, says=("a_folder", "is a folder holding no key files")),
    Case("not parquet", non_members="fake.parquet", files={"fake.parquet": b"key,count\na,1\n"},
         says=("fake.parquet", "not a readable Parquet file", "real format")),
    Case("csv with a broken quote", non_members="quote.csv", files={"quote.csv": csv_text('key,count\nok,1\n"open,2\nnext,3\n')},
         says=("quote.csv", "line 3", "never closed", "close the quote")),
    Case("csv with a stray quote", non_members="stray.csv", files={"stray.csv": csv_text('key,count\nok,1\n"ab"c,2\n')},
         says=("stray.csv", "line 3", "quote the whole field")),
    Case("csv with too many fields", non_members="ragged.csv", files={"ragged.csv": csv_text("key,count\nok,1\nx,y,2\n")},
         says=("ragged.csv", "line 3 has 3 fields", "header has 2")),
    Case("ndjson that is not json", non_members="broken.ndjson", files={"broken.ndjson": b'{"key": "a"}\n{"key": \n'},
         says=("broken.ndjson", "line 2 is not valid JSON", "one JSON object a line")),
    Case("no key column", non_members="handles.csv", files={"handles.csv": csv_text("handle,count\na,1\n")},
         says=("handles.csv", "no `key` column", "handle", "name the key column `key`")),
    Case("counts under another name", non_members="lookups.csv", files={"lookups.csv": csv_text("key,lookups\na,3\n")},
         says=("lookups.csv", "no `count` column, but column `lookups` holds numbers", "--count-column lookups")),
    Case("a column named twice", non_members="twice.csv", files={"twice.csv": csv_text("key,key,count\na,b,1\n")},
         says=("twice.csv", "`key` is given twice", "give each column its own name")),
    Case("numbers as keys", members="numbers.ndjson", files={"numbers.ndjson": b'{"key": 1}\n{"key": 2}\n'},
         says=("numbers.ndjson", "column `key` holds", "write keys as strings")),
    Case("null key", non_members="nulls.parquet", files={"nulls.parquet": parquet({"key": ["a", None], "count": [1, 2]})},
         says=("nulls.parquet", "row 2 has no key", "remove the row")),
    Case("empty csv field", non_members="blank.csv", files={"blank.csv": csv_text("key,count\na,1\n,2\n")},
         says=("blank.csv", "row 2 (line 3) has no key")),
    Case("empty line", members="gaps.txt", files={"gaps.txt": b"a\n\nb\n"}, says=("gaps.txt", "line 2 has an empty key", "remove it")),
    Case("empty string key", non_members="empty.parquet", files={"empty.parquet": parquet({"key": ["a", ""]})},
         says=("empty.parquet", "row 2 has an empty key")),
    Case("not utf-8 in a line", members="latin.txt", files={"latin.txt": b"fine\ncaf\xe9\n"},
         says=("latin.txt", "line 2 is not valid UTF-8", 'key_encoding = "bytes"')),
    Case("not utf-8 in a csv", non_members="latin.csv", files={"latin.csv": b"key,count\nok,1\ncaf\xe9,2\n"},
         says=("latin.csv", "line 3 is not valid UTF-8", 'key_encoding = "bytes"')),
    Case("not utf-8 in parquet", non_members="raw.parquet",
         files={"raw.parquet": lambda p: pl.DataFrame({"key": pl.Series([b"ok", b"\xff\xfe"], dtype=pl.Binary)}).write_parquet(p)},
         says=("raw.parquet", "row 2 holds a key that is not valid UTF-8", 'key_encoding = "bytes"')),
    Case("bytes mode on a csv", non_members="plain.csv", files={"plain.csv": csv_text("key\na\n")}, extra=("--key-encoding", "bytes"),
         says=("plain.csv", 'key_encoding "bytes"', "convert the file")),
    Case("key over max_key_bytes", members="long.txt", files={"long.txt": b"short\n" + b"x" * 20 + b"\n"},
         config="[corpus]\nmax_key_bytes = 8\n", says=("long.txt", "line 2 has a key of 20 bytes", "max_key_bytes = 8", "raise corpus.max_key_bytes")),
    Case("negative count", non_members="neg.csv", files={"neg.csv": csv_text("key,count\na,1\nb,-3\n")},
         says=("neg.csv", "row 2 (line 3) has count '-3'", "whole numbers from 1")),
    Case("zero count", non_members="zero.csv", files={"zero.csv": csv_text("key,count\na,1\nb,0\n")},
         says=("zero.csv", "row 2 (line 3) has count '0'", "drop the row")),
    Case("fractional count", non_members="half.parquet", files={"half.parquet": parquet({"key": ["a", "b"], "count": [1.0, 2.5]})},
         says=("half.parquet", "row 2 has count 2.5")),
    Case("nan count", non_members="nan.parquet", files={"nan.parquet": parquet({"key": ["a", "b"], "count": [1.0, float("nan")]})},
         says=("nan.parquet", "row 2 has count nan")),
    Case("text count", non_members="text.csv", files={"text.csv": csv_text("key,count\na,1\nb,many\n")},
         says=("text.csv", "row 2 (line 3) has count 'many'")),
    Case("count beyond 2^53", non_members="huge.csv", files={"huge.csv": csv_text("key,count\na,1\nb,1e20\n")},
         says=("huge.csv", "row 2 (line 3) has count '1e20'", "2^53")),
    Case("no members", members="none.txt", files={"none.txt": b""}, says=("none.txt", "no members")),
    Case("no non-members", non_members="none.csv", files={"none.csv": csv_text("key,count\n")}, says=("none.csv", "no non-members")),
    Case("every non-member is a member", members="same.txt", non_members="same.txt", files={"same.txt": b"a\nb\n"},
         says=("same.txt", "every non-member is also a member")),
    Case("a key on both lists with conflicts = error", members="both.txt", files={"both.txt": "good members and one non-member"},
         config='[corpus]\nconflicts = "error"\n', says=("both member and non-member", 'corpus.conflicts = "member"')),
    Case("too few held-out non-members", non_members="few.txt", files={"few.txt": "120 non-members"},
         says=("held-out", "needs at least 60 held-out tail lookups")),
    Case("too few to split", non_members="two.txt", files={"two.txt": b"alpha\nbeta\n"}, says=("two.txt", "give more non-members")),
    Case("unknown config key", early=True, config="[corpus]\ncolour = \"red\"\n", says=("unknown config key corpus.colour", "allowed in [corpus]")),
    Case("unknown config table", early=True, config="[colours]\nred = 1\n", says=("unknown config table [colours]",)),
    Case("wrong config type", early=True, config='[target]\nfpr = "low"\n', says=("config key target.fpr", "must be a finite number")),
    Case("config value out of range", early=True, config="[target]\nfpr = 0.7\n", says=("config key target.fpr", "between 1e-09 and 0.5")),
    Case("config seed out of range", early=True, config="[filters]\nhash_seed = -1\n", says=("config key filters.hash_seed", "between 0 and")),
    Case("config that is not toml", early=True, config="[target\n", says=("not valid TOML",)),
    Case("target out of range on the command line", early=True, extra=("--target-fpr", "2"), says=("option --target-fpr", "between 1e-09 and 0.5", "did you mean 0.02 (2%)?")),
    Case("store is a file", store_is_a_file=True, says=("is a file, not a folder",)),
    Case("corpus too large for memory", env={MEMORY_LIMIT_ENV: "64M"},
         says=("members.txt", "non_members.txt", "needs about", "more than the 0.1 GiB of memory available", MEMORY_LIMIT_ENV)),
    Case("a memory limit that is not a size", env={MEMORY_LIMIT_ENV: "lots"}, says=(MEMORY_LIMIT_ENV, "is not a size")),
]
if not IS_ROOT:  # root reads any file whatever its mode, so the case cannot be built as root
    BAD.append(Case("unreadable file", members="locked.txt", files={"locked.txt": "locked"}, says=("locked.txt", "permission denied")))

GOOD = [
    Case("duplicates merge", members="dupes.txt", non_members="dupes.csv", files={"dupes.txt": "members with duplicates",
                                                                                 "dupes.csv": "non-members with duplicates"}, code=0),
    Case("a key on both lists stays a member", members="both.txt", files={"both.txt": "good members and one non-member"}, code=0),
    Case("raw bytes read as bytes", members="raw.txt", files={"raw.txt": "members with raw bytes"}, extra=("--key-encoding", "bytes"), code=0),
]

# How many rows of the duplicates case repeat an earlier key, and the counts of the repeated non-member.
MEMBER_REPEATS = 3
REPEATED_NON_MEMBER, REPEATED_COUNTS = "zz-repeated", (2, 5, 7)


def _write(path: Path, content, good_members: list[str], good_non_members: list[str]) -> None:
    """Write one case file; a few named contents are built from the good corpus."""
    if callable(content):
        content(path)
    elif content == "folder":
        path.mkdir()
    elif content == "locked":
        path.write_text("a\n")
        path.chmod(0)
    elif content == "good members and one non-member":
        write_lines(path, good_members + [good_non_members[0]])
    elif content == "120 non-members":
        write_lines(path, good_non_members[:120])
    elif content == "members with duplicates":
        write_lines(path, good_members + good_members[:MEMBER_REPEATS])
    elif content == "non-members with duplicates":
        rows = [f"{key},1" for key in good_non_members] + [f"{REPEATED_NON_MEMBER},{c}" for c in REPEATED_COUNTS]
        path.write_text("key,count\n" + "\n".join(rows) + "\n")
    elif content == "members with raw bytes":
        path.write_bytes(b"".join(k.encode() + b"\n" for k in good_members) + b"raw\xff\xfekey\n")
    else:
        path.write_bytes(content)


def _fake_published_store(store: Path) -> None:
    """A store with one published version (its files' bytes do not matter: bad input reads none)."""
    staging = publish.new_staging(store, "earlier")
    (staging / publish.ARTIFACT_NAME).write_bytes(b"an earlier artifact")
    publish.write_report(staging, {"version": 1})
    with publish.store_lock(store):
        publish.publish_staging(store, staging, keep=10)


def run_cases(root: Path, group: list[Case]) -> dict:
    """Write every case's files, run the group in one process, and return per case what it did."""
    good_members_path, good_non_path = write_small_corpus(root / "good")
    good_members = good_members_path.read_text().splitlines()
    good_non = good_non_path.read_text().splitlines()
    runs, cases = [], {}
    for number, case in enumerate(group):
        folder = root / f"case-{number}"
        folder.mkdir()
        for name, content in case.files.items():
            _write(folder / name, content, good_members, good_non)
        config = folder / "build.toml"
        config.write_text(SMALL_CONFIG_TOML + case.config)
        store = folder / "store"
        if case.store_is_a_file:
            store.write_text("not a store\n")
        elif case.code == 2:
            _fake_published_store(store)
        members = folder / case.members if case.members else good_members_path
        non_members = folder / case.non_members if case.non_members else good_non_path
        argv = ["build", str(config), "--members", str(members), "--non-members", str(non_members),
                "--target-fpr", TARGET, "--store", str(store), *case.extra]
        cases[case.name] = {"folder": folder, "store": store, "before": _store_now(store)}
        runs.append({"name": case.name, "argv": argv, "env": case.env})
    cases_path, results_path = root / "cases.json", root / "results.json"
    cases_path.write_text(json.dumps(runs))
    # the CLI's own quiet Prefect defaults, as a user gets them (conftest sets a louder level)
    env = {k: v for k, v in os.environ.items() if k != "PREFECT_LOGGING_LEVEL"}
    done = subprocess.run([sys.executable, str(TESTS / "cli_runner.py"), str(cases_path), str(results_path)],
                          capture_output=True, text=True, env=env, timeout=540)
    assert done.returncode == 0, done.stderr[-3000:]
    for result in json.loads(results_path.read_text()):
        cases[result["name"]].update(result)
    return cases


EARLY = [case for case in BAD if case.early]
LATE = [case for case in BAD if not case.early]


@pytest.fixture(scope="module")
def early_outcomes(tmp_path_factory) -> dict:
    return run_cases(tmp_path_factory.mktemp("early"), EARLY)


@pytest.fixture(scope="module")
def outcomes(tmp_path_factory) -> dict:
    return run_cases(tmp_path_factory.mktemp("late"), LATE + GOOD)


def _store_now(store: Path):
    return snapshot(store) if store.is_dir() else store.read_bytes() if store.exists() else None


def assert_refused_with_one_line(got: dict, case: Case) -> None:
    assert got["code"] == 2, got["stderr"][-2000:]
    lines = got["stderr"].splitlines()
    assert len(lines) == 1, f"stderr has {len(lines)} lines:\n{got['stderr'][-2000:]}"
    assert lines[0].startswith("tamis: ")
    for fragment in case.says:
        assert fragment in lines[0], f"{fragment!r} missing from: {lines[0]}"
    assert _store_now(got["store"]) == got["before"], "the store changed"


@pytest.mark.parametrize("case", EARLY, ids=lambda case: case.name)
def test_early_bad_input_exits_2_with_one_line_and_writes_nothing(early_outcomes, case):
    assert_refused_with_one_line(early_outcomes[case.name], case)


@pytest.mark.slow
@pytest.mark.parametrize("case", LATE, ids=lambda case: case.name)
def test_bad_corpus_exits_2_with_one_line_and_writes_nothing(outcomes, case):
    assert_refused_with_one_line(outcomes[case.name], case)


def _report(got) -> dict:
    return json.loads((got["store"] / "1" / publish.REPORT_NAME).read_text())


def _accepted(outcomes, name: str) -> dict:
    got = outcomes[name]
    assert got["code"] == 0, got["stderr"][-2000:]
    assert publish.current_version(got["store"]) == 1
    return got


@pytest.mark.slow
def test_duplicates_are_merged_with_counts_summed_and_counted(outcomes):
    got = _accepted(outcomes, "duplicates merge")
    folder = got["folder"]
    members = (folder / "dupes.txt").read_text().splitlines()
    corpus = _report(got)["corpus"]
    assert corpus["member_rows"] == len(members) and corpus["member_duplicates"] == MEMBER_REPEATS
    assert corpus["members"] == len(members) - MEMBER_REPEATS
    assert corpus["non_member_duplicates"] == len(REPEATED_COUNTS) - 1
    rows = pl.read_csv(folder / "dupes.csv")
    assert corpus["non_members"] == rows["key"].n_unique()
    assert corpus["lookups"] == rows["count"].sum()  # every lookup kept: the repeated key's counts summed


@pytest.mark.slow
def test_a_key_on_both_lists_stays_a_member_and_is_counted(outcomes):
    got = _accepted(outcomes, "a key on both lists stays a member")
    members = (got["folder"] / "both.txt").read_text().splitlines()
    shared = members[-1]
    corpus = _report(got)["corpus"]
    assert corpus["conflicts"] == 1 and corpus["members"] == len(members)
    artifact = open_filter(got["store"] / "1" / publish.ARTIFACT_NAME)
    assert artifact.contains(shared)


@pytest.mark.slow
def test_raw_bytes_are_read_with_key_encoding_bytes(outcomes):
    got = _accepted(outcomes, "raw bytes read as bytes")
    artifact = open_filter(got["store"] / "1" / publish.ARTIFACT_NAME)
    assert artifact.contains(b"raw\xff\xfekey")
    assert _report(got)["corpus"]["members"] == len((got["folder"] / "raw.txt").read_bytes().splitlines())
