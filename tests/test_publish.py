"""Store: versions, the pointer IN_SERVICE, refused builds, retention, rollback, staging locks and confinement."""

import errno
import os
import subprocess
import sys
import textwrap

import pytest

from tamis import publish
from tamis_testing import snapshot


def _stage(store, build_id: str, text: str = "x"):
    staging = publish.new_staging(store, build_id)
    (staging / publish.ARTIFACT_NAME).write_text(text)
    publish.write_report(staging, {"build_id": build_id})
    return staging


def _publish(store, build_id: str, keep: int = 10, text: str = "x") -> int:
    staging = _stage(store, build_id, text)
    with publish.store_lock(store):
        return publish.publish_staging(store, staging, keep=keep)


def test_versions_count_up_and_current_follows(tmp_path):
    store = tmp_path / "store"
    assert publish.current_version(store) is None
    for expected in (1, 2, 3):
        assert publish.next_version(store) == expected
        assert _publish(store, f"b{expected}") == expected
        assert publish.current_version(store) == expected
    assert publish.published_versions(store) == [1, 2, 3]
    assert publish.current_artifact(store) == store / "3" / publish.ARTIFACT_NAME
    assert not list(store.glob(".staging-*"))


def test_the_pointer_has_a_name_of_its_own(tmp_path):
    store = tmp_path / "store"
    _publish(store, "b1")
    assert publish.POINTER_NAME == "IN_SERVICE" and (store / "IN_SERVICE").read_text() == "1\n"
    assert not (store / "CURRENT").exists()


def test_a_store_with_the_old_pointer_name_is_read_and_migrated_once(tmp_path):
    store = tmp_path / "store"
    _publish(store, "b1")
    _publish(store, "b2")
    # the store as an earlier release left it: the pointer named CURRENT
    os.rename(store / publish.POINTER_NAME, store / publish.LEGACY_POINTER_NAME)
    assert publish.current_version(store) == 2 and publish.current_artifact(store) == store / "2" / publish.ARTIFACT_NAME
    with publish.store_lock(store):  # what every build and rollback takes first
        assert (store / publish.POINTER_NAME).read_text() == "2\n"
        assert not (store / publish.LEGACY_POINTER_NAME).exists()
    assert publish.rollback(store).version == 1 and publish.current_version(store) == 1
    # a crash between writing the new pointer and removing the old: the new one wins, the old goes
    (store / publish.LEGACY_POINTER_NAME).write_text("2\n")
    assert publish.current_version(store) == 1
    assert _publish(store, "b3") == 3 and not (store / publish.LEGACY_POINTER_NAME).exists()
    # an old pointer that names no version is left for its readers to report, and the build goes on
    (store / publish.POINTER_NAME).unlink()
    (store / publish.LEGACY_POINTER_NAME).write_text("banana")
    with publish.store_lock(store):
        pass
    with pytest.raises(publish.StoreError, match="CURRENT holds 'banana', not a version number"):
        publish.current_version(store)


def test_refused_build_leaves_current_alone(tmp_path):
    store = tmp_path / "store"
    _publish(store, "good")
    with publish.store_lock(store):
        kept = publish.refuse_staging(store, _stage(store, "bad"), "bad")
        again = publish.refuse_staging(store, _stage(store, "bad"), "bad")
    assert publish.current_version(store) == 1
    assert (kept / publish.REPORT_NAME).is_file() and (again / publish.REPORT_NAME).is_file()
    assert kept != again and again.parent == kept.parent == store / "refused"
    assert publish.published_versions(store) == [1]


def test_retention_keeps_the_newest(tmp_path):
    store = tmp_path / "store"
    for i in range(5):
        _publish(store, f"b{i}", keep=2)
    assert publish.published_versions(store) == [4, 5]
    assert not list(store.glob(".removing-*"))


def test_retention_unlinks_a_symlinked_version_and_never_follows_it(tmp_path):
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    (elsewhere / publish.ARTIFACT_NAME).write_text("not ours")
    store = tmp_path / "store"
    store.mkdir()
    (store / "1").symlink_to(elsewhere, target_is_directory=True)
    _publish(store, "b2", keep=1)
    assert not (store / "1").exists()
    assert (elsewhere / publish.ARTIFACT_NAME).read_text() == "not ours"


def test_a_half_removed_old_version_is_cleared_by_the_next_publish(tmp_path):
    store = tmp_path / "store"
    _publish(store, "b1")
    leftover = store / ".removing-7-0badf00d"
    leftover.mkdir()
    (leftover / "report.json").write_text("{}")
    _publish(store, "b2")
    assert not leftover.exists()


def test_a_version_named_folder_without_artifact_is_not_a_version_and_is_set_aside(tmp_path):
    store = tmp_path / "store"
    _publish(store, "b1")
    (store / "2").mkdir()
    (store / "2" / "junk").write_text("half a copy")
    assert publish.published_versions(store) == [1]
    assert _publish(store, "b2") == 2
    assert (store / "2" / publish.ARTIFACT_NAME).read_text() == "x"
    assert not (store / "2" / "junk").exists()


def test_rollback_goes_back_one_version_and_refuses_past_the_first(tmp_path):
    store = tmp_path / "store"
    for i in range(2):
        _publish(store, f"b{i}")
    assert publish.rollback(store).version == 1
    assert publish.current_version(store) == 1
    with pytest.raises(publish.StoreError, match="is the oldest published version"):
        publish.rollback(store)


def test_a_stale_staging_folder_of_a_crashed_build_is_cleared(tmp_path):
    store = tmp_path / "store"
    (store / ".staging-crashed").mkdir(parents=True)
    staging = _stage(store, "next")
    assert [p.name for p in store.glob(".staging-*")] == [staging.name]
    assert staging.name.startswith(".staging-next-")


def test_a_running_build_keeps_its_staging_folder_in_this_process(tmp_path):
    store = tmp_path / "store"
    first = _stage(store, "first")
    second = _stage(store, "second")
    assert first.is_dir() and second.is_dir()
    publish.discard_staging(first)
    assert not first.exists()
    # released: a later build in another process may now clear it, and it is gone already
    third = _stage(store, "third")
    assert sorted(p.name for p in store.glob(".staging-*")) == sorted([second.name, third.name])


_HOLDER = textwrap.dedent(
    """
    import sys, time
    from pathlib import Path
    from tamis import publish
    staging = publish.new_staging(Path(sys.argv[1]), "holder")
    print(staging, flush=True)
    time.sleep(600)
    """
)


def test_another_process_s_running_build_keeps_its_staging_folder_until_it_dies(tmp_path):
    store = tmp_path / "store"
    holder = subprocess.Popen([sys.executable, "-c", _HOLDER, str(store)], stdout=subprocess.PIPE, text=True)
    try:
        held = holder.stdout.readline().strip()
        assert held, "the holder process did not start"
        mine = _stage(store, "mine")
        assert os.path.isdir(held) and mine.is_dir()
    finally:
        holder.kill()
        holder.wait()
        holder.stdout.close()
    later = _stage(store, "later")
    assert not os.path.exists(held)
    assert mine.is_dir() and later.is_dir()


def test_a_staging_folder_removed_before_it_was_locked_is_replaced(tmp_path, monkeypatch):
    store = tmp_path / "store"
    real_flock = publish.fcntl.flock
    raced = []

    def flock_after_a_clean_up(fd, operation):
        # another build's clean-up removes the fresh folder in the instant before its lock is taken
        if not raced:
            raced.extend(store.glob(".staging-*"))
            for folder in raced:
                folder.rmdir()
        return real_flock(fd, operation)

    monkeypatch.setattr(publish.fcntl, "flock", flock_after_a_clean_up)
    staging = publish.new_staging(store, "raced")
    assert raced and staging not in raced and staging.is_dir()


def test_build_ids_must_be_plain_names(tmp_path):
    for bad in ("../evil", "a/b", "/abs", ".hidden", "", "x" * 200):
        with pytest.raises(publish.StoreError, match="not a plain name"):
            publish.new_staging(tmp_path / "store", bad)
    assert not (tmp_path / "evil").exists()


@pytest.mark.parametrize(
    "content",
    ["banana", "../x", "/etc/passwd", "1/../2", "2/..", "\u00b2", "\u0663", "007", "0", "-1", "+1", "1 2",
     "1e3", "", "9" * 19, "1" + " " * 100],
)
def test_current_holding_anything_but_a_version_number_is_refused(tmp_path, content):
    store = tmp_path / "store"
    store.mkdir()
    (store / publish.POINTER_NAME).write_text(content)
    with pytest.raises(publish.StoreError, match="not a version number"):
        publish.current_version(store)
    with pytest.raises(publish.StoreError):
        publish.current_artifact(store)


def test_current_accepts_a_number_with_or_without_a_newline(tmp_path):
    store = tmp_path / "store"
    store.mkdir()
    for content in ("12\n", "12", " 12\r\n"):
        (store / publish.POINTER_NAME).write_text(content)
        assert publish.current_version(store) == 12


def test_only_canonical_version_folders_are_versions(tmp_path):
    store = tmp_path / "store"
    for name in ("3", "007", "\u00b2", "1x", "0", ".4"):
        (store / name).mkdir(parents=True)
        (store / name / publish.ARTIFACT_NAME).write_text("x")
    (store / "5").write_text("a file, not a folder")
    assert publish.published_versions(store) == [3]


def test_check_store_refuses_files_and_writes_nothing(tmp_path):
    afile = tmp_path / "afile"
    afile.write_text("x")
    with pytest.raises(publish.StoreError, match="is a file, not a folder"):
        publish.check_store(afile)
    with pytest.raises(publish.StoreError, match="cannot be created"):
        publish.check_store(afile / "store")
    with pytest.raises(publish.StoreError, match="is a file"):
        publish.new_staging(afile, "b1")
    publish.check_store(tmp_path / "new" / "store")
    assert not (tmp_path / "new").exists()


def test_stale_current_temporaries_are_removed_when_current_changes(tmp_path):
    store = tmp_path / "store"
    _publish(store, "b1")
    (store / ".IN_SERVICE.99999.tmp").write_text("7\n")
    _publish(store, "b2")
    assert not list(store.glob(".IN_SERVICE.*.tmp"))
    assert publish.current_version(store) == 2


def _full_disk_on_fsync(monkeypatch, path_fragment: str):
    """os.fsync of an open file whose path contains `path_fragment` fails as on a full disk."""
    real_fsync = os.fsync

    def fsync(fd):
        if path_fragment in os.readlink(f"/proc/self/fd/{fd}"):
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_fsync(fd)

    monkeypatch.setattr(publish.os, "fsync", fsync)


def test_a_full_disk_while_switching_current_leaves_the_store_as_it_was(tmp_path, monkeypatch):
    store = tmp_path / "store"
    _publish(store, "b1")
    before = snapshot(store)
    staging = _stage(store, "b2")
    _full_disk_on_fsync(monkeypatch, ".IN_SERVICE.")
    with publish.store_lock(store), pytest.raises(OSError) as raised:
        publish.publish_staging(store, staging, keep=10)
    assert raised.value.errno == errno.ENOSPC
    assert staging.is_dir(), "the folder goes back to staging for the build to discard"
    publish.discard_staging(staging)
    assert snapshot(store) == before
    assert publish.current_version(store) == 1
