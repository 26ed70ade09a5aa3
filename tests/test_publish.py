"""Store: versions, CURRENT, refused builds, retention and rollback."""

import pytest

from pipeline import publish


def _stage(store, build_id: str, text: str = "x"):
    staging = publish.new_staging(store, build_id)
    (staging / publish.ARTIFACT_NAME).write_text(text)
    publish.write_report(staging, {"build_id": build_id})
    return staging


def test_versions_count_up_and_current_follows(tmp_path):
    store = tmp_path / "store"
    assert publish.current_version(store) is None
    for expected in (1, 2, 3):
        with publish.store_lock(store):
            assert publish.publish_staging(store, _stage(store, f"b{expected}"), keep=10) == expected
        assert publish.current_version(store) == expected
    assert publish.published_versions(store) == [1, 2, 3]
    assert publish.current_artifact(store) == store / "3" / publish.ARTIFACT_NAME
    assert not list(store.glob(".staging-*"))


def test_refused_build_leaves_current_alone(tmp_path):
    store = tmp_path / "store"
    with publish.store_lock(store):
        publish.publish_staging(store, _stage(store, "good"), keep=10)
    kept = publish.refuse_staging(store, _stage(store, "bad"), "bad")
    assert publish.current_version(store) == 1
    assert (kept / publish.REPORT_NAME).is_file()
    assert publish.published_versions(store) == [1]


def test_retention_keeps_the_newest(tmp_path):
    store = tmp_path / "store"
    for i in range(5):
        with publish.store_lock(store):
            publish.publish_staging(store, _stage(store, f"b{i}"), keep=2)
    assert publish.published_versions(store) == [4, 5]


def test_rollback_goes_back_one_version_and_refuses_past_the_first(tmp_path):
    store = tmp_path / "store"
    for i in range(2):
        with publish.store_lock(store):
            publish.publish_staging(store, _stage(store, f"b{i}"), keep=10)
    assert publish.rollback(store) == 1
    assert publish.current_version(store) == 1
    with pytest.raises(publish.StoreError, match="no published version older"):
        publish.rollback(store)


def test_a_stale_staging_folder_of_a_crashed_build_is_cleared(tmp_path):
    store = tmp_path / "store"
    (store / ".staging-crashed").mkdir(parents=True)
    _stage(store, "next")
    assert [p.name for p in store.glob(".staging-*")] == [".staging-next"]


def test_garbage_in_current_is_a_clear_error(tmp_path):
    store = tmp_path / "store"
    store.mkdir()
    (store / publish.CURRENT_NAME).write_text("banana")
    with pytest.raises(publish.StoreError, match="not a version number"):
        publish.current_version(store)
