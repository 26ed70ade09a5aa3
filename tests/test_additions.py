"""Members added between builds (`tamis add`, `tamis.additions`): whole checksummed batches,
served at once on top of the version in service on every answer path, and bad input refused with
nothing recorded. The format is checked against a second reader written from FORMAT.md section 9
alone; the build's side (folding, refusals, rollback) is in tests/test_folding.py."""

from __future__ import annotations

import os
import shutil
import signal
import struct
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest
import xxhash

from tamis import additions, publish
from tamis.artifact import read_artifact, write_artifact
from tamis.errors import BadInput
from tamis.loader import AdditionsLoadError, DegradedFilter, open_filter
from tamis.query import available_paths
from tamis_testing import build_artifact, random_keys, snapshot

BASE36 = "abcdefghijklmnopqrstuvwxyz0123456789"


def spec_reader(data: bytes) -> list[bytes] | None:
    """A batch read from FORMAT.md section 9 alone: its keys, or None when a reader must refuse it."""
    if len(data) < 32 or data[:8] != bytes.fromhex("8954414d41440d0a"):
        return None
    major, _minor, count, length, checksum = struct.unpack("<HHIQQ", data[8:32])
    if major != 1 or length != len(data) - 32 or xxhash.xxh3_64_intdigest(data[:24] + data[32:]) != checksum:
        return None
    keys, at = [], 32
    for _ in range(count):
        if at + 4 > len(data):
            return None
        size = int.from_bytes(data[at : at + 4], "little")
        if at + 4 + size > len(data):
            return None
        keys.append(data[at + 4 : at + 4 + size])
        at += 4 + size
    return keys if at == len(data) else None


def test_a_batch_reads_back_as_written_and_as_the_format_page_specifies():
    keys = [b"frost_wyrm_1984", "Ærøskøbing_ßot".encode(), b"\x00\xff\r", b"x" * 300]
    data = additions.encode_batch(keys)
    assert additions.decode_batch(data, "batch") == keys == spec_reader(data)
    assert additions.decode_batch(additions.encode_batch([]), "empty") == []


def test_every_torn_altered_or_foreign_batch_is_refused_by_both_readers():
    data = additions.encode_batch([k.encode() for k in random_keys(np.random.default_rng(3), 40, BASE36, 1, 20)])
    damaged = [data[:cut] for cut in range(len(data))]  # every torn prefix, the empty file included
    damaged += [data[:i] + bytes([data[i] ^ 0x10]) + data[i + 1 :] for i in range(0, len(data), 3)]
    damaged += [data + b"\x00", b"PK\x03\x04" + data[4:], data[:8] + struct.pack("<H", 2) + data[10:]]
    for bad in damaged:
        assert spec_reader(bad) is None
        with pytest.raises(additions.BatchError):
            additions.decode_batch(bad, "bad")


@pytest.fixture
def store(tmp_path) -> Path:
    """A store folder with a version in service (a fake artifact: add never reads it)."""
    (tmp_path / "store" / "1").mkdir(parents=True)
    (tmp_path / "store" / publish.POINTER_NAME).write_text("1\n")
    return tmp_path / "store"


def batch_keys(store: Path) -> dict[int, list[bytes]]:
    return {number: additions.read_batch(path) for number, path, _ in additions.listed(store)}


def test_adds_are_numbered_in_order_whole_and_never_reuse_a_retired_number(store):
    first = additions.add_keys(store, ["a1", b"a2", "a1"])
    second = additions.add_keys(store, ["b1"])
    assert (first.number, first.keys, second.number) == (1, 2, 2)
    assert batch_keys(store) == {1: [b"a1", b"a2"], 2: [b"b1"]}
    (store / "additions" / "RETIRED").write_text("2\n")
    for _, path, _ in additions.listed(store):
        path.unlink()
    assert additions.add_keys(store, ["c1"]).number == 3


@pytest.mark.parametrize("keys, message", [
    (["ok", ""], "key 2 is empty"),
    (["ok", "x" * 4097], "key 2 is 4097 bytes, over the corpus limit of 4096"),
    ([], "no keys to add"),
    (["ok", "ok", ""], "key 3 is empty"),  # counted as given, before duplicates are dropped
])
def test_bad_keys_are_refused_and_nothing_is_recorded(store, keys, message):
    before = snapshot(store)
    with pytest.raises(BadInput, match=message):
        additions.add_keys(store, keys)
    assert snapshot(store) == before


def test_a_path_that_is_no_store_is_refused(tmp_path):
    with pytest.raises(BadInput, match="no such folder"):
        additions.add_keys(tmp_path / "absent", ["k"])
    with pytest.raises(BadInput, match="is not a tamis store"):
        additions.add_keys(tmp_path, ["k"])
    assert list(tmp_path.iterdir()) == []


def tamis(*argv: str, stdin: bytes = b"") -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "tamis.cli", *argv], input=stdin, capture_output=True)


def test_the_add_command_reads_arguments_stdin_and_files_like_lookup(store, tmp_path):
    assert tamis("add", str(store), "argkey_1", "argkey_2").returncode == 0
    assert tamis("add", str(store), stdin=b"\xef\xbb\xbfstdin_1\r\nstdin_2\n").returncode == 0
    listed_file = tmp_path / "banned.txt"
    listed_file.write_bytes(b"file_1\nfile_2")
    assert tamis("add", str(store), "--file", str(listed_file)).returncode == 0
    assert tamis("add", str(store), "--key-encoding", "bytes", stdin=b"raw\xff\x00key\n").returncode == 0
    assert batch_keys(store) == {1: [b"argkey_1", b"argkey_2"], 2: [b"stdin_1", b"stdin_2"], 3: [b"file_1", b"file_2"],
                                 4: [b"raw\xff\x00key"]}


@pytest.mark.parametrize("argv, stdin, message", [
    (["add", "{missing}", "k"], b"", "no store at"),
    (["add", "{store}"], b"ok\n\nafter\n", "key 2 is empty"),
    (["add", "{store}"], b"ok\n\xff\xfe\n", "standard input: line 2 is not valid UTF-8"),
    (["add", "{store}", "--key-encoding", "bytes"], b"ok\r\n", "standard input: line 1 ends in a carriage return"),
    (["add", "{store}", "--file", "{missing}"], b"", "cannot be read"),
    (["add", "--max-key-bytes", "3", "{store}", "four"], b"", "over the corpus limit of 3"),
])
def test_bad_input_to_the_command_exits_2_with_one_line_and_records_nothing(store, tmp_path, argv, stdin, message):
    before = snapshot(store)
    done = tamis(*[a.format(store=store, missing=tmp_path / "missing") for a in argv], stdin=stdin)
    assert done.returncode == 2 and message in done.stderr.decode()
    assert done.stderr.decode().count("\n") == 1 and done.stdout == b""
    assert snapshot(store) == before


def test_concurrent_adds_lose_nothing(store):
    writers = [subprocess.Popen([sys.executable, "-m", "tamis.cli", "add", str(store)], stdin=subprocess.PIPE,
                                stdout=subprocess.DEVNULL) for _ in range(8)]
    expected = set()
    for number, writer in enumerate(writers):
        keys = [f"writer{number}_key{i}".encode() for i in range(200)]
        expected.update(keys)
        writer.stdin.write(b"\n".join(keys) + b"\n")
        writer.stdin.close()
    assert [writer.wait() for writer in writers] == [0] * 8
    batches = batch_keys(store)
    assert sorted(batches) == list(range(1, 9))
    assert set().union(*map(set, batches.values())) == expected and sum(map(len, batches.values())) == len(expected)


KILLED_ADD = textwrap.dedent("""
    import os, signal, sys, threading
    from tamis.additions import add_keys
    store, delay = sys.argv[1], float(sys.argv[2])
    keys = [b"killed_%07d" % i for i in range(int(sys.argv[3]))]
    threading.Timer(delay, os.kill, (os.getpid(), signal.SIGKILL)).start()
    add_keys(store, keys)
    print("done", flush=True)
    threading.Event().wait()  # the timer ends this process in every run
""")


def test_sigkill_at_any_point_of_an_add_never_leaves_a_batch_a_reader_accepts_torn(store):
    count = 400_000  # about 7 MB: long enough to be killed while writing, flushing and renaming
    started = time.perf_counter()
    additions.add_keys(store, [b"killed_%07d" % i for i in range(count)])
    seconds = time.perf_counter() - started
    shutil.rmtree(store / "additions")
    outcomes = []
    for share in np.linspace(0.0, 1.6, 17):
        done = subprocess.run([sys.executable, "-c", KILLED_ADD, str(store), str(share * seconds), str(count)],
                              capture_output=True, text=True)
        assert done.returncode == -signal.SIGKILL
        outcomes.append("done" in done.stdout)
    full = [b"killed_%07d" % i for i in range(count)]
    batches = batch_keys(store)  # raises if any batch file is torn
    assert all(keys == full for keys in batches.values())
    assert len(batches) >= sum(outcomes)  # every add that returned left its whole batch
    for leftover in (store / "additions").iterdir():
        assert leftover.name in (".lock", *(f"{n}.batch" for n in batches)) or leftover.name.endswith(".tmp")
    assert additions.add_keys(store, ["after"]).number > max(batches, default=0)


# --- served on top of the version in service ---------------------------------------------------


@pytest.fixture(scope="module")
def artifacts(tmp_path_factory) -> dict:
    """Version "a" (members 0..799, built before additions) and "b" (members 400..1199, its build
    read the additions through batch 2)."""
    rng = np.random.default_rng(5)
    keys = sorted({k.encode() for k in random_keys(rng, 1400, BASE36, 8, 12)})[:1200]
    others = [k.encode() for k in dict.fromkeys(random_keys(rng, 6000, BASE36[:26], 5, 10))]
    half = len(others) // 2
    folder = tmp_path_factory.mktemp("artifacts")
    built = {}
    for name, members, through in (("a", keys[:800], None), ("b", keys[400:], 2)):
        path = folder / f"{name}.tamis"
        build_artifact(path, (members, others[:half], np.ones(half), others[half:], np.ones(len(others) - half)), 0.05, 3)
        if through is not None:
            header, sections = read_artifact(path)
            header = {**header, "provenance": {**header["provenance"], "additions_through": through}}
            write_artifact(path, header, {k: np.array(v) for k, v in sections.items()})
        built[name] = path
    return {**built, "members": keys, "others": others}


def publish_artifact(store_path: Path, artifact: Path, keep: int = 10) -> int:
    staging = publish.new_staging(store_path, "test")
    shutil.copyfile(artifact, staging / publish.ARTIFACT_NAME)
    with publish.store_lock(store_path):
        return publish.publish_staging(store_path, staging, keep)


def answered_no(artifact: Path, keys: list[bytes], count: int) -> list[bytes]:
    answers = open_filter(artifact).contains_many(keys)
    return [key for key, answer in zip(keys, answers) if not answer][:count]


@pytest.mark.parametrize("answer_path", ["numpy", "compiled"])
def test_added_keys_answer_maybe_on_every_path_and_no_other_answer_changes(artifacts, tmp_path, answer_path):
    if answer_path not in available_paths():
        pytest.skip("numba is not installed or is disabled")
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])
    added = answered_no(artifacts["a"], artifacts["others"], 300)
    probe = artifacts["others"] + artifacts["members"]
    before = open_filter(artifacts["a"], answer_path=answer_path).contains_many(probe)
    with open_filter(store, answer_path=answer_path) as served:
        assert not served.contains_many(added).any()
        additions.add_keys(store, added[:100])
        additions.add_keys(store, [k.decode() for k in added[100:]])  # str keys are their UTF-8 bytes
        assert served.refresh() is False and served.added == 300  # same version: only the batches read
        assert served.contains_many(added).all() and all(served.contains(k) for k in added)
        assert all(k.decode() in served for k in added)
        assert served.contains_many(np.array(added, dtype=object)).all()
        expected = before | np.isin(np.array(probe, dtype=object), np.array(added, dtype=object))
        assert (served.contains_many(probe) == expected).all()  # held exactly: no other key changes
        assert [served.contains(k) for k in probe[:500]] == expected[:500].tolist()


def test_a_refresh_reads_new_batches_without_reopening_the_artifact(artifacts, tmp_path, monkeypatch):
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])
    added = answered_no(artifacts["a"], artifacts["others"], 5)
    with open_filter(store) as served:
        monkeypatch.setattr("tamis.store.read_in_service", lambda folder: pytest.fail("the artifact was read again"))
        additions.add_keys(store, added)
        served.refresh()
        assert served.contains_many(added).all()


def test_a_background_refresh_serves_an_added_key_within_two_intervals(artifacts, tmp_path):
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])
    key = answered_no(artifacts["a"], artifacts["others"], 1)[0]
    with open_filter(store, refresh_seconds=0.2) as served:
        additions.add_keys(store, [key])
        added_at = time.monotonic()
        while not served.contains(key):
            assert time.monotonic() - added_at < 0.4, "not served within two refresh intervals"
            time.sleep(0.01)


def test_each_version_serves_the_batches_added_after_its_build(artifacts, tmp_path):
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])  # built before additions: every batch is served on it
    publish_artifact(store, artifacts["b"])  # its build read through batch 2
    no_on_both = [k for k in answered_no(artifacts["a"], artifacts["others"], 400)
                  if k in set(answered_no(artifacts["b"], artifacts["others"], 400))][:30]
    for part in (no_on_both[:10], no_on_both[10:20], no_on_both[20:]):
        additions.add_keys(store, part)
    with open_filter(store) as served:
        assert served.version == 2 and served.info["additions"] == {"folded_through": 2, "pending_keys": 10}
        assert served.contains_many(no_on_both).tolist() == [False] * 20 + [True] * 10
        publish.rollback(store)
        assert served.refresh() is True and served.version == 1
        assert served.contains_many(no_on_both).all()


def test_a_damaged_batch_refuses_to_open_or_answers_maybe_to_every_key(artifacts, tmp_path):
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])
    batch = additions.add_keys(store, ["first"]).path
    good = batch.read_bytes()
    batch.write_bytes(good[:-1])
    with pytest.raises(AdditionsLoadError, match="1.batch"):
        open_filter(store)
    with pytest.warns(RuntimeWarning), open_filter(store, on_error="maybe") as served:
        assert served.degraded and served.contains_many(artifacts["others"][:50]).all()
        batch.write_bytes(good)
        served.refresh()
        assert not served.degraded and served.contains("first")
        batch.with_name("2.batch").write_bytes(good[:-1])
        served.refresh()  # a damaged batch appears while served: every key is maybe, never a false no
        assert served.degraded and served.contains("anything")


def test_a_store_wiped_and_rebuilt_is_noticed_though_its_version_number_is_the_same(artifacts, tmp_path):
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])
    only_b = [k for k in artifacts["members"][800:] if k not in set(artifacts["members"][:800])]
    with open_filter(store) as served:
        additions.add_keys(store, ["old_store_key"])
        served.refresh()
        shutil.rmtree(store)
        publish_artifact(store, artifacts["b"])
        assert served.version == 1 and served.refresh() is True and served.version == 1
        assert served.contains_many(only_b).all() and served.info["additions"]["folded_through"] == 2


def test_lookup_of_a_store_answers_with_its_additions(artifacts, tmp_path):
    store = tmp_path / "store"
    publish_artifact(store, artifacts["a"])
    key = answered_no(artifacts["a"], artifacts["others"], 1)[0]
    assert tamis("lookup", str(store), key.decode()).stdout == key + b"\tno\n"
    assert tamis("add", str(store), key.decode()).returncode == 0
    assert tamis("lookup", str(store), key.decode()).stdout == key + b"\tmaybe\n"
    assert tamis("lookup", str(store), stdin=key + b"\n").stdout == key + b"\tmaybe\n"
