"""Publish stage: the store of versions, and the atomic switch of the version in service.

    STORE/
      IN_SERVICE              the version in service, as a decimal number and a newline
      1/ 2/ 3/ ...            published versions: artifact.tamis and report.json
      refused/<build>/        builds the gate refused, kept with their report for inspection
      .staging-<build>-<r>/   a build in progress, locked by its build (removed or renamed when it ends)
      .removing-<v>-<r>/      an old version being deleted (renamed first, so it vanishes at once)
      .lock                   held while a build publishes

A version folder appears by one rename of a complete staging folder, and IN_SERVICE changes by
one rename of a complete temporary file; both are fsynced, so after a crash at any point IN_SERVICE
names either the old or the new version, never a torn one (invariant 4). What a service reads of a
store (the pointer's name, the version it names) lives in `tamis.store`, which needs no build stack.
A store written before the pointer had its name holds `CURRENT`: the first build or rollback that
takes the store's lock writes IN_SERVICE from it and removes it (`migrate_pointer`).

Several builds may share a store. Each holds an flock on its own staging folder while it runs; a
new build removes only staging folders whose lock it can take (their build died), never a running
one's. Publishing, refusing and the clean-up of what a crash left behind happen under the store's
lock, so one build publishes at a time.

Everything stays inside the store: the names read from it (the pointer's content, version folders) must
be canonical version numbers ("1", "2", ...; no sign, no leading zero, ASCII digits only), so no
`..`, absolute path or other text can point elsewhere; the names written into it come from a build
id checked to be one plain path component; and removing a folder never follows a symbolic link out.
"""

from __future__ import annotations

import fcntl
import json
import os
import re
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

from tamis import additions
from tamis.artifact import ArtifactError, fsync_directory, load_artifact, write_atomically
from tamis.store import ARTIFACT_NAME, LEGACY_POINTER_NAME, POINTER_NAME, StoreError, is_version_name
from tamis.store import artifact_in_service as current_artifact
from tamis.store import version_in_service as current_version

REPORT_NAME = "report.json"
LOCK_NAME = ".lock"
STAGING_PREFIX = ".staging-"
REMOVING_PREFIX = ".removing-"
REFUSED_NAME = "refused"

# A build id (the stem of staging and refused folder names): one plain path component.
_BUILD_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,127}")
# Staging folders this process builds in, each with the open descriptor that holds its flock.
_held_staging: dict[Path, int] = {}


def check_store(store: Path) -> None:
    """Raise StoreError unless `store` is a folder this process can write in, or can be created.

    Writes nothing, so a caller may check the store before a build starts.
    """
    existing = store
    while not existing.exists() and existing != existing.parent:
        existing = existing.parent
    if existing == store and not store.is_dir():
        raise StoreError(f"store {store} is a file, not a folder; give the path of a folder (it is created if missing)")
    if not existing.is_dir():
        raise StoreError(f"store {store} cannot be created: {existing} is a file; check the path")
    if not os.access(existing, os.W_OK | os.X_OK):
        raise StoreError(f"store {store}: {existing} is not writable by this user; fix its permissions or pick another store")


def _ensure_store(store: Path) -> None:
    check_store(store)
    try:
        store.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise StoreError(f"cannot create store {store}: {exc.strerror}; check the path and its permissions") from None


def published_versions(store: Path) -> list[int]:
    """Versions with an artifact, ascending; folders with other names are not versions."""
    if not store.is_dir():
        return []
    return sorted(
        int(p.name) for p in store.iterdir() if is_version_name(p.name) and p.is_dir() and (p / ARTIFACT_NAME).is_file()
    )


def set_current(store: Path, version: int) -> None:
    """Put `version` in service: IN_SERVICE names it, by one atomic rename, and a pointer of the
    store's old name is removed. Call with the store lock held: temporary files of the pointer that
    a crashed writer left are removed first (every writer of the pointer holds the lock)."""
    _remove_pointer_temporaries(store)
    write_atomically(store / POINTER_NAME, [f"{version}\n".encode()])
    if (store / LEGACY_POINTER_NAME).exists():
        (store / LEGACY_POINTER_NAME).unlink()
        fsync_directory(store)


def _remove_pointer_temporaries(store: Path) -> None:
    for name in (POINTER_NAME, LEGACY_POINTER_NAME):
        for stale in store.glob(f".{name}.*.tmp"):
            stale.unlink(missing_ok=True)


def migrate_pointer(store: Path) -> None:
    """A store whose pointer still has its old name (CURRENT) gets IN_SERVICE naming the same
    version, and the old pointer goes. Call with the store lock held; a crash in between leaves both
    naming one version, and the reader prefers IN_SERVICE."""
    if not (store / LEGACY_POINTER_NAME).exists():
        return
    try:
        version = current_version(store)
    except StoreError:
        return  # a pointer that names no version stays as it is, for its readers to report
    set_current(store, version)


@contextmanager
def store_lock(store: Path) -> Iterator[None]:
    """Hold the store's lock: a second build waits here until the first has published."""
    _ensure_store(store)
    with open(store / LOCK_NAME, "a+b") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
            migrate_pointer(store)
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def _check_build_id(build_id: str) -> None:
    if _BUILD_ID.fullmatch(build_id) is None:
        raise StoreError(f"build id {build_id!r} is not a plain name (letters, digits, '.', '_', '-'); it names folders in the store")


def _remove_tree(folder: Path) -> None:
    """Remove a folder of the store; a symbolic link is unlinked, never followed."""
    if folder.is_symlink():
        folder.unlink(missing_ok=True)
    else:
        shutil.rmtree(folder, ignore_errors=True)


def _try_lock(folder: Path) -> int | None:
    """An open descriptor holding `folder`'s flock, or None when another process holds it (or the
    folder is gone)."""
    try:
        fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY | os.O_NOFOLLOW)
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        return None
    return fd


def remove_stale_staging(store: Path) -> list[Path]:
    """Remove the staging folders of builds that died (their lock is free); returns them.

    A running build's folder is locked and stays. A folder made a moment ago whose build has not
    locked it yet may go too: its build notices and makes another (see `new_staging`).
    """
    removed = []
    for candidate in store.glob(f"{STAGING_PREFIX}*"):
        fd = _try_lock(candidate)  # fails on a folder this process holds too: flock is per open file
        if fd is None:
            continue
        try:
            _remove_tree(candidate)
        finally:
            os.close(fd)
        removed.append(candidate)
    return removed


def new_staging(store: Path, build_id: str) -> Path:
    """An empty staging folder for one build, locked by this process until the build publishes,
    is refused or discards it; stale ones of crashed builds are removed first."""
    _check_build_id(build_id)
    _ensure_store(store)
    remove_stale_staging(store)
    while True:
        staging = store / f"{STAGING_PREFIX}{build_id}-{os.urandom(4).hex()}"
        try:
            staging.mkdir()
        except FileExistsError:
            continue
        fd = os.open(staging, os.O_RDONLY | os.O_DIRECTORY)
        # blocks only while another build's clean-up holds it, which then removes the folder
        fcntl.flock(fd, fcntl.LOCK_EX)
        try:
            still_there = os.stat(staging, follow_symlinks=False).st_ino == os.fstat(fd).st_ino
        except FileNotFoundError:
            still_there = False
        if still_there:
            _held_staging[staging] = fd
            return staging
        os.close(fd)


def _release(staging: Path) -> None:
    fd = _held_staging.pop(staging, None)
    if fd is not None:
        os.close(fd)


def discard_staging(staging: Path) -> None:
    """Remove a build's staging folder and release its lock (a build that failed)."""
    try:
        _remove_tree(staging)
    finally:
        _release(staging)


def write_report(folder: Path, report: dict) -> None:
    write_atomically(folder / REPORT_NAME, [(json.dumps(report, indent=2, sort_keys=True) + "\n").encode()])


def next_version(store: Path) -> int:
    """The number the next published version gets."""
    versions = published_versions(store)
    return (versions[-1] if versions else 0) + 1


def _set_aside(folder: Path) -> None:
    """Rename `folder` out of the way at once, then remove it (a crash leaves only a .removing-*)."""
    trash = folder.with_name(f"{REMOVING_PREFIX}{folder.name}-{os.urandom(4).hex()}")
    os.rename(folder, trash)
    _remove_tree(trash)


def _clear_leftovers(store: Path) -> None:
    """What crashed publishes left: half-removed old versions. Call with the store lock held."""
    for leftover in store.glob(f"{REMOVING_PREFIX}*"):
        _remove_tree(leftover)


def clear_crash_leftovers(store: Path) -> None:
    """Everything crashed builds left (half-removed versions, staging folders of dead builds,
    temporary pointers, temporary reports in published versions), for a build that publishes
    nothing. Call with the store lock held: a published version's files are rewritten only under it."""
    _clear_leftovers(store)
    remove_stale_staging(store)
    _remove_pointer_temporaries(store)
    for version in published_versions(store):
        for stale in (store / str(version)).glob(".*.tmp"):
            stale.unlink(missing_ok=True)


def publish_staging(store: Path, staging: Path, keep: int) -> int:
    """Make a verified staging folder the next version and switch IN_SERVICE to it; returns the version.

    Call with the store lock held. If IN_SERVICE cannot be switched, the folder is renamed back to
    `staging` and the error raised: the store is as it was. Versions beyond the newest `keep` are
    removed, never the current one.
    """
    _clear_leftovers(store)
    version = next_version(store)
    target = store / str(version)
    if target.exists() or target.is_symlink():
        _set_aside(target)  # a folder with a version's name but no artifact: not a version
    fsync_directory(staging)
    os.rename(staging, target)
    try:
        fsync_directory(store)
        set_current(store, version)
    except BaseException:
        os.rename(target, staging)
        raise
    _release(staging)
    for old in published_versions(store)[:-keep]:
        if old != version:
            _set_aside(store / str(old))
    return version


def refuse_staging(store: Path, staging: Path, build_id: str) -> Path:
    """Keep a refused build's folder under refused/ for inspection; IN_SERVICE is left untouched.

    Call with the store lock held. A second refusal of the same build id gets a numbered name.
    """
    _check_build_id(build_id)
    refused = store / REFUSED_NAME
    refused.mkdir(exist_ok=True)
    target = refused / build_id
    number = 1
    while target.exists() or target.is_symlink():
        number += 1
        target = refused / f"{build_id}.{number}"
    os.rename(staging, target)
    _release(staging)
    return target


def require_store(store: Path) -> None:
    """Raise StoreError unless `store` is a store folder, one that a build, a publish or `tamis add`
    has left its marks in: the commands that read or change a store (`tamis versions`, `tamis
    rollback`) must not take a mistyped path or another folder for an empty store, nor write in it."""
    if not store.exists():
        raise StoreError(f"no store at {store}: no such folder; check the path (a store is the folder a build publishes into)")
    if not store.is_dir():
        raise StoreError(f"store {store} is a file, not a folder; give the path of a store folder")
    marks = (POINTER_NAME, LEGACY_POINTER_NAME, LOCK_NAME, REFUSED_NAME, additions.FOLDER_NAME)
    if not any((store / mark).exists() for mark in marks) and not published_versions(store):
        raise StoreError(f"{store} is not a tamis store: it holds no version, no {POINTER_NAME}, {LOCK_NAME}, "
                         f"{REFUSED_NAME}/ or {additions.FOLDER_NAME}/; check the path (a store is the folder a build publishes into)")


@dataclass(frozen=True)
class Rollback:
    """The version a rollback put in service; members of later versions it lacks, covered by the
    addition batch `batch` or dropped."""

    version: int
    covered: int = 0
    dropped: int = 0
    batch: int | None = None


def members_lacked(store: Path, version: int) -> list[bytes]:
    """Members that the versions published after `version` hold (their member lists) and that
    neither `version` nor the batches served on top of it (added after its build) hold."""
    lists = [additions.read_members(store / str(v)) for v in published_versions(store) if v > version]
    lists = [members for members in lists if members is not None]  # versions built before member lists: unknown
    if not lists:
        return []
    folder = store / str(version)
    held = set(additions.read_members(folder) or ())
    through = additions.folded_through(load_artifact(folder / ARTIFACT_NAME).header)
    held.update(additions.NO_PENDING.after(store, through).keys)
    lacked = {}
    for members in lists:
        lacked.update(dict.fromkeys(key for key in members if key not in held))
    return list(lacked)


def rollback(store: Path, to: int | None = None, newer_members: str | None = None) -> Rollback:
    """Put a published version back in service; returns it.

    Without `to`, the newest version older than the one in service; with `to`, that version, older
    or newer than the one in service (so a rollback can be undone). Every batch added after the
    version was built is served on top of it. Members of later versions that it lacks (they came
    through a later export) refuse the rollback, naming how many, unless `newer_members` is "cover"
    (they are added as one batch before the switch, so none answers no at any moment) or "drop".
    """
    require_store(store)
    with store_lock(store):
        current = current_version(store)
        versions = published_versions(store)
        if to is not None:
            if to not in versions:
                listed = ", ".join(map(str, versions)) or "none"
                raise StoreError(f"{store}: version {to} is not published here (published: {listed}); pick one of those")
            chosen = to
        elif current is None:
            raise StoreError(f"{store}: no version is in service, so there is nothing to roll back from; publish a build first")
        else:
            older = [v for v in versions if v < current]
            if not older:
                raise StoreError(
                    f"{store}: version {current} is the oldest published version; there is no older one to roll back to"
                )
            chosen = older[-1]
        try:
            lacked = members_lacked(store, chosen)
        except (additions.BatchError, ArtifactError) as error:
            raise StoreError(f"{store}: cannot tell which members version {chosen} lacks: {error}") from None
        if lacked and newer_members is None:
            raise StoreError(
                f"{store}: version {chosen} lacks {len(lacked):,} members that later versions hold (they came through a later "
                f"export); it would answer no for them. Pass --newer-members cover to add them as a batch (served as maybe), "
                f"or --newer-members drop to let them answer no"
            )
        batch = None
        if lacked and newer_members == "cover":
            batch = additions.add_keys(store, lacked, max_key_bytes=max(map(len, lacked))).number
        set_current(store, chosen)
        covered = len(lacked) if batch is not None else 0
        return Rollback(chosen, covered, len(lacked) - covered, batch)
