"""A key added to a store is "maybe" for a service from its next refresh on, at every moment after:
across a build that folds it in, a build the gate refuses, a rebuild of identical inputs and a
rollback. A service process refreshing every 0.5 s records its answers while one store lives
through all of that (small builds without Prefect, tests/small_build.py)."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from tamis import additions, folding, publish
from tamis.artifact import read_artifact, write_artifact
from tamis.config import CorpusSettings
from tamis.corpus import load_corpus
from tamis.loader import open_filter
from tamis.store import StoreError
from small_build import first_members, small_config, write_corpus
from tamis_testing import build_artifact, plain_build_flow, random_keys, snapshot

REFRESH_SECONDS = 0.5
# keys never in any export: banned between builds, and banned while a build runs
ROGUE, DURING = "rogue_bot_between_builds", "rogue_bot_during_a_build"
LATE = 50  # members of the full export that version 1's export lacks

SERVICE = textwrap.dedent("""
    import sys, time
    from tamis.loader import open_filter
    store, log, keys = sys.argv[1], sys.argv[2], sys.argv[3:]
    with open_filter(store, refresh_seconds=REFRESH) as served, open(log, "a", buffering=1) as out:
        while True:
            single = "".join("1" if served.contains(k) else "0" for k in keys)
            batch = "".join("1" if a else "0" for a in served.contains_many(keys))
            out.write(f"{time.time()} {served.version} {single} {batch}\\n")
            time.sleep(0.01)
""").replace("REFRESH", repr(REFRESH_SECONDS))


@pytest.fixture(scope="module")
def story(tmp_path_factory) -> dict:
    root = tmp_path_factory.mktemp("folding")
    members, lookups = write_corpus(root)
    all_keys = members.read_text(encoding="utf-8").splitlines()
    early = first_members(members, len(all_keys) - LATE, root / "early.txt")
    shrunk = first_members(members, len(all_keys) // 2, root / "shrunk.txt")
    looked_up = pl.read_parquet(lookups)["key"][0]  # a non-member the lookups hold
    store, log = root / "store", root / "answers.log"
    late = all_keys[-LATE:]
    watched = [all_keys[-1], ROGUE, looked_up, DURING, *late[:3]]
    times: dict[str, float] = {}
    outcomes = {}
    with plain_build_flow() as build:
        outcomes["v1"] = build(small_config(early, lookups, store))
        service = subprocess.Popen([sys.executable, "-c", SERVICE, str(store), str(log), *watched])
        try:
            while not log.exists() or not log.read_text():
                time.sleep(0.05)
            times["added"] = time.time()
            outcomes["batch1"] = additions.add_keys(store, [all_keys[-1], ROGUE, looked_up])
            real_read = folding.read_pending

            def read_then_add(folder):  # a batch written while the build runs, after its read point
                pending = real_read(folder)
                times["during"] = time.time()
                outcomes["batch2"] = additions.add_keys(folder, [DURING])
                return pending

            folding.read_pending = read_then_add
            try:
                outcomes["v2"] = build(small_config(members, lookups, store))
            finally:
                folding.read_pending = real_read
            times["v2"] = time.time()
            outcomes["before_refused"] = snapshot(store / "additions")
            outcomes["refused"] = build(small_config(shrunk, lookups, store))
            outcomes["after_refused"] = snapshot(store / "additions")
            outcomes["v3"] = build(small_config(members, lookups, store))
            time.sleep(2 * REFRESH_SECONDS)  # long enough in service for the service to swap to it
            outcomes["again"] = build(small_config(members, lookups, store))
            with pytest.raises(StoreError) as refused_rollback:
                publish.rollback(store, to=1)
            outcomes["refused_rollback"] = str(refused_rollback.value)
            outcomes["rollback"] = publish.rollback(store, to=1, newer_members="cover")
            times["rollback"] = time.time()
            time.sleep(3 * REFRESH_SECONDS)
        finally:
            service.kill()
            service.wait()
    answers = []
    for line in log.read_text().splitlines():
        at, version, single, batch = line.split()
        answers.append((float(at), version, single, batch))
    return {"root": root, "store": store, "answers": answers, "times": times, "watched": watched, "late": late,
            "all_keys": all_keys, **outcomes}


def answers_after(story: dict, since: float, index: int) -> list[tuple[str, str]]:
    return [(single[index], batch[index]) for at, _, single, batch in story["answers"] if at >= since]


@pytest.mark.parametrize("index, moment", [(0, "added"), (1, "added"), (2, "added"), (3, "during")])
def test_an_added_key_is_maybe_within_two_refreshes_and_at_every_moment_after(story, index, moment):
    since = story["times"][moment] + 2 * REFRESH_SECONDS
    after = answers_after(story, since, index)
    assert len(after) > 100 and set(after) == {("1", "1")}, f"key {story['watched'][index]!r} answered no"
    # the run covered the rebuild, the refused build, the unchanged build and the rollback
    assert {version for at, version, _, _ in story["answers"] if at >= since} >= {"1", "3"}


def test_a_late_member_is_never_no_once_a_version_held_it_even_after_the_rollback(story):
    since = story["times"]["v2"] + 2 * REFRESH_SECONDS
    for index in (4, 5, 6):
        assert set(answers_after(story, since, index)) == {("1", "1")}
    assert any(version == "1" and at > story["times"]["rollback"] + 2 * REFRESH_SECONDS
               for at, version, _, _ in story["answers"])


def test_the_build_folds_in_what_it_read_and_records_the_point(story):
    v2 = story["v2"]
    assert v2.published and v2.version == 2
    assert v2.report["additions"] == {"folded_through": 1, "batches": 1, "keys": 3, "not_in_export": 2,
                                      "retired_through": 0}
    assert v2.report["provenance"]["additions_through"] == 1
    artifact = open_filter(story["store"] / "2" / publish.ARTIFACT_NAME)
    assert artifact.info["provenance"]["additions_through"] == 1
    assert artifact.contains_many(story["watched"][:3]).all()  # members of the build itself now
    assert additions.read_members(story["store"] / "2")[-2:] == [ROGUE.encode(), story["watched"][2].encode()]
    assert story["batch2"].number == 2  # written during the build: after its point, pending on top of v2


def test_a_refused_build_retires_nothing(story):
    assert not story["refused"].published and story["before_refused"] == story["after_refused"]


def test_the_next_build_folds_the_batch_written_during_the_last_one_and_identical_inputs_publish_nothing(story):
    v3, again = story["v3"], story["again"]
    assert v3.published and v3.version == 3 and v3.report["additions"]["folded_through"] == 2
    assert open_filter(story["store"] / "3" / publish.ARTIFACT_NAME).contains(DURING)
    assert again.unchanged and again.version == 3 and not again.published
    assert publish.published_versions(story["store"]) == [1, 2, 3]


def test_a_rollback_that_would_miss_later_members_refuses_and_covers_them_when_asked(story):
    # version 1 lacks the 50 late members; one of them was added (batch 1, served on top of it)
    assert f"lacks {LATE - 1:,} members that later versions hold" in story["refused_rollback"]
    rollback = story["rollback"]
    assert (rollback.version, rollback.covered, rollback.dropped, rollback.batch) == (1, LATE - 1, 0, 3)
    with open_filter(story["store"]) as served:
        assert served.version == 1 and served.contains_many(story["late"]).all()
        assert served.contains_many([ROGUE, DURING]).all()


# --- retirement ----------------------------------------------------------------------------------


def versioned(tmp_path, throughs: list[int], keep: int) -> Path:
    """A store of small artifacts whose builds read the batches through `throughs` (in order)."""
    tmp_path.mkdir(exist_ok=True)
    rng = np.random.default_rng(9)
    keys = [k.encode() for k in random_keys(rng, 900, "abcdefghij0123", 6, 10)]
    path = tmp_path / "a.tamis"
    build_artifact(path, (keys[:300], keys[300:600], np.ones(300), keys[600:], np.ones(300)), 0.05, 3)
    store = tmp_path / "store"
    for through in throughs:
        staging = publish.new_staging(store, "t")

        header, sections = read_artifact(path)
        header = {**header, "provenance": {**header["provenance"], "additions_through": through}}
        write_artifact(staging / publish.ARTIFACT_NAME, header, {k: np.array(v) for k, v in sections.items()})
        with publish.store_lock(store):
            publish.publish_staging(store, staging, keep)
    return store


def test_batches_every_kept_version_folded_in_are_retired_and_their_numbers_never_reused(tmp_path):
    store = versioned(tmp_path, [0], keep=2)
    for number in range(1, 6):
        additions.add_keys(store, [f"k{number}"])
    assert folding.retire(store) == 0 and len(additions.listed(store)) == 5
    store = versioned(tmp_path / "more", [2, 4, 5], keep=2)  # kept: through 4 and 5
    for number in range(1, 7):
        additions.add_keys(store, [f"k{number}"])
    assert folding.retire(store) == 4
    assert [n for n, _, _ in additions.listed(store)] == [5, 6]
    assert (store / "additions" / "RETIRED").read_text() == "4\n"
    assert additions.add_keys(store, ["next"]).number == 7


def test_added_keys_are_members_never_non_members_and_no_labelling_conflict(tmp_path):
    members, lookups = write_corpus(tmp_path, members=500, non_members=5000)
    looked_up = pl.read_parquet(lookups)["key"][0].encode()
    exported = members.read_text(encoding="utf-8").splitlines()[0].encode()
    settings = CorpusSettings(conflicts="error")
    corpus = load_corpus(members, lookups, settings, [looked_up, exported, b"never_seen"])
    assert corpus.members[-2:] == [looked_up, b"never_seen"] and len(corpus.members) == 502
    assert corpus.stats["added_not_in_export"] == 2
    assert all(looked_up not in part.keys for part in corpus.non_member_parts)
    assert load_corpus(members, lookups, settings).stats["added_not_in_export"] == 0


def test_the_summary_counts_the_keys_folded_in_and_warns_about_those_the_export_lacks(story):
    from tamis.cli import summary_text

    text = summary_text(story["v2"].report, story["store"] / "2")
    assert "added members folded in: 3 from 1 batches (through batch 1)" in text
    assert "WARNING 2 of them are not in today's export: they stay members" in text


def test_a_version_published_during_a_build_from_a_later_export_is_not_replaced(tmp_path):
    store = tmp_path / "store"
    for version, ns in ((1, 5_000), (2, 9_000)):
        (store / str(version)).mkdir(parents=True)
        (store / str(version) / publish.ARTIFACT_NAME).write_bytes(b"x")
        inputs = {"members_modified_ns": ns, "members_modified_at": f"t{ns}"}
        (store / str(version) / publish.REPORT_NAME).write_text(json.dumps({"inputs": inputs}))
    (store / publish.POINTER_NAME).write_text("2\n")
    ours = {"members_modified_ns": 7_000, "members_modified_at": "t7000"}
    reason = folding.newer_inputs_reason(store, ours, newest_at_start=1)  # version 2 came during the build
    assert reason.startswith("older_inputs: version 2 in service was built from a members export modified at t9000")
    assert "--replace-newer" in reason
    assert folding.newer_inputs_reason(store, ours, newest_at_start=2) is None  # there before the build: a rebuild
    later = {"members_modified_ns": 9_500, "members_modified_at": "t9500"}
    assert folding.newer_inputs_reason(store, later, newest_at_start=1) is None


def test_a_partitioned_export_was_modified_when_its_latest_partition_was(tmp_path):
    import os

    folder = tmp_path / "members"
    folder.mkdir()
    for i, ns in enumerate((3_000_000_000, 9_000_000_000, 5_000_000_000)):
        part = folder / f"part-{i}.txt"
        part.write_text("key\n")
        os.utime(part, ns=(ns, ns))
    (folder / "_SUCCESS").write_text("")  # a writer's marker, touched last, is no partition
    assert folding.members_modified_ns(folder) == 9_000_000_000
    assert folding.members_modified_ns(folder / "part-*.txt") == 9_000_000_000
    assert folding.members_modified_ns(folder / "part-[02].txt") == 5_000_000_000
