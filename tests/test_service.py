"""A service's view: `open_filter` on a store folder serves the version in service, swaps to a newly
published one on `refresh()` or on an interval while other threads query, and never races the
publish that prunes the version it was reading."""

from __future__ import annotations

import shutil
import threading
import time

import numpy as np
import pytest

from tamis import publish, store
from tamis.artifact import read_artifact, write_artifact
from tamis.loader import DegradedFilter, FilterLoadError, MembershipFilter, ServedFilter, open_filter
from tamis_testing import build_artifact, random_keys

BASE36 = "abcdefghijklmnopqrstuvwxyz0123456789"
MEASURED = {"fpr": 0.0061, "fpr_upper": 0.0079, "target_fpr": 0.01, "confidence": 0.95, "keys": 12_000}


@pytest.fixture(scope="module")
def versions(tmp_path_factory) -> dict:
    """Two artifacts: version "a" holds members 0..1199, version "b" members 400..1599."""
    rng = np.random.default_rng(21)
    keys = sorted({k.encode() for k in random_keys(rng, 1800, BASE36, 8, 12)})[:1600]
    others = [k.encode() for k in dict.fromkeys(random_keys(rng, 6000, BASE36[:26], 5, 10))]
    half = len(others) // 2
    folder = tmp_path_factory.mktemp("versions")
    built = {}
    for name, members in (("a", keys[:1200]), ("b", keys[400:])):
        path = folder / f"{name}.tamis"
        build_artifact(path, (members, others[:half], np.ones(half), others[half:], np.ones(len(others) - half)), 0.01, 3)
        header, sections = read_artifact(path)
        write_artifact(path, {**header, "measured": MEASURED}, {k: np.array(v) for k, v in sections.items()})
        built[name] = path
    return {**built, "a_members": keys[:1200], "b_members": keys[400:], "both": keys[400:1200], "others": others}


def publish_artifact(store_path, artifact, keep: int = 1) -> int:
    staging = publish.new_staging(store_path, "test")
    shutil.copyfile(artifact, staging / publish.ARTIFACT_NAME)
    with publish.store_lock(store_path):
        return publish.publish_staging(store_path, staging, keep)


def test_a_store_folder_serves_its_version_in_service(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    with open_filter(tmp_path) as served:
        assert isinstance(served, ServedFilter) and served.version == 1
        assert served.contains_many(versions["a_members"]).all()
        assert all(served.contains(k) for k in versions["a_members"][:100]) and versions["a_members"][0] in served
        assert (served.fpr, served.fpr_upper, served.target) == (0.0061, 0.0079, 0.01)
        assert served.built_at == "2026-12-01T00:00:00Z" and served.info["measured"] == MEASURED
        assert served.contains_many(versions["others"]).mean() < 0.1


def test_the_store_handle_switches_answer_path_for_every_version_it_serves(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    with open_filter(tmp_path) as served:
        assert served.using("numpy") is served and served._current().filter.answer_path == "numpy"
        assert served.contains_many(versions["a_members"]).all() and all(served.contains(k) for k in versions["a_members"][:50])
        publish_artifact(tmp_path, versions["b"])
        assert served.refresh() and served._current().filter.answer_path == "numpy"
        assert served.contains_many(versions["b_members"]).all()
        with pytest.raises(ValueError, match="not available here"):
            served.using("gpu")


def test_refresh_swaps_to_a_newly_published_version(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    served = open_filter(tmp_path)
    assert served.refresh() is False
    publish_artifact(tmp_path, versions["b"])  # keep=1: version 1 is pruned
    assert served.version == 1 and served.contains_many(versions["a_members"]).all()  # its own copy of version 1
    assert served.refresh() is True and served.version == 2
    assert served.contains_many(versions["b_members"]).all()
    served.close()


def test_threads_query_through_a_publish_and_a_swap_without_a_false_no(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    served = open_filter(tmp_path)
    both = versions["both"]
    stop, errors, answered, seen = threading.Event(), [], [], set()

    def query(batch: bool) -> None:
        try:
            while not stop.is_set():
                answers = served.contains_many(both) if batch else [served.contains(k) for k in both[:50]]
                answered.append(bool(np.all(answers)))
                seen.add(served.version)
        except Exception as error:  # every exception is a failure of the test
            errors.append(error)

    threads = [threading.Thread(target=query, args=(i % 2 == 0,)) for i in range(4)]
    for thread in threads:
        thread.start()
    time.sleep(0.3)
    publish_artifact(tmp_path, versions["b"])
    assert served.refresh() is True
    time.sleep(0.3)
    stop.set()
    for thread in threads:
        thread.join(timeout=30)
    assert errors == [] and answered and all(answered)
    assert seen == {1, 2}
    served.close()


def test_an_interval_picks_up_a_new_version_and_close_stops_it(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    served = open_filter(tmp_path, refresh_seconds=0.1)
    publish_artifact(tmp_path, versions["b"])
    deadline = time.monotonic() + 20
    while served.version != 2 and time.monotonic() < deadline:
        time.sleep(0.05)
    assert served.version == 2
    served.close()
    assert not any(t.name.startswith("tamis-refresh") and t.is_alive() for t in threading.enumerate())
    with pytest.raises(ValueError, match="closed"):
        served.contains(b"x")


def test_opening_while_a_publish_prunes_the_version_read_reads_again(versions, tmp_path, monkeypatch):
    publish_artifact(tmp_path, versions["a"])
    publish_artifact(tmp_path, versions["b"])  # version 1 is gone
    pointer_reads = iter([1])  # the first read of the pointer still saw version 1
    real = store.version_in_service
    monkeypatch.setattr(store, "version_in_service", lambda folder: next(pointer_reads, None) or real(folder))
    with open_filter(tmp_path) as served:
        assert served.version == 2 and served.contains_many(versions["b_members"]).all()


def test_a_store_without_a_version_in_service(versions, tmp_path):
    with pytest.raises(FilterLoadError, match=f"no version in service \\(no {store.POINTER_NAME} file\\)"):
        open_filter(tmp_path)
    with pytest.warns(RuntimeWarning):
        served = open_filter(tmp_path, on_error="maybe")
    assert served.degraded and served.version is None and served.contains(b"anything")
    publish_artifact(tmp_path, versions["a"])
    assert served.refresh() is True and not served.degraded and served.version == 1
    served.close()


def test_a_new_version_that_cannot_be_opened_leaves_the_served_one(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    served = open_filter(tmp_path)
    broken = tmp_path / "broken.tamis"
    broken.write_bytes(versions["b"].read_bytes()[:-7])
    publish_artifact(tmp_path, broken, keep=5)
    with pytest.raises(FilterLoadError, match="truncated"):
        served.refresh()
    assert served.version == 1 and served.contains_many(versions["a_members"]).all()
    served.close()


def test_every_filter_prints_as_one_short_line(versions, tmp_path):
    publish_artifact(tmp_path, versions["a"])
    with pytest.warns(RuntimeWarning):
        degraded = open_filter(tmp_path / "absent.tamis", on_error="maybe")
    for shown in (repr(open_filter(versions["a"])), repr(degraded), repr(open_filter(tmp_path))):
        assert "\n" not in shown and len(shown) < 300, shown
    assert isinstance(open_filter(versions["a"]), MembershipFilter) and isinstance(degraded, DegradedFilter)
    assert "version 1" in repr(open_filter(tmp_path)) and "fpr 0.61%" in repr(open_filter(versions["a"]))
