"""Publish stage: the store of versions, and the atomic switch of the version in service.

    STORE/
      CURRENT                 the version in service, as a decimal number and a newline
      1/ 2/ 3/ ...            published versions: artifact.tamis and report.json
      refused/<build>/        builds the gate refused, kept with their report for inspection
      .staging-<build>-<r>/   a build in progress, locked by its build (removed or renamed when it ends)
      .removing-<v>-<r>/      an old version being deleted (renamed first, so it vanishes at once)
      .lock                   held while a build publishes

A version folder appears by one rename of a complete staging folder, and CURRENT changes by one
rename of a complete temporary file; both are fsynced, so after a crash at any point CURRENT names
either the old or the new version, never a torn one (invariant 4).

Several builds may share a store. Each holds an flock on its own staging folder while it runs; a
new build removes only staging folders whose lock it can take (their build died), never a running
one's. Publishing, refusing and the clean-up of what a crash left behind happen under the store's
lock, so one build publishes at a time.

Everything stays inside the store: the names read from it (CURRENT's content, version folders) must
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
from pathlib import Path

from tamis.artifact import fsync_directory, write_atomically
from tamis.errors import BadInput

ARTIFACT_NAME = "artifact.tamis"
REPORT_NAME = "report.json"
CURRENT_NAME = "CURRENT"
LOCK_NAME = ".lock"
STAGING_PREFIX = ".staging-"
REMOVING_PREFIX = ".removing-"
REFUSED_NAME = "refused"

# A version number: what CURRENT holds and what a version folder is named. Up to 18 digits, so
# every one fits in int64.
_VERSION = re.compile(r"[1-9][0-9]{0,17}")
# A build id (the stem of staging and refused folder names): one plain path component.
_BUILD_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._-]{0,127}")
# CURRENT holds a version number and a newline; anything longer is not read, let alone trusted.
_CURRENT_MAX_BYTES = 64

# Staging folders this process builds in, each with the open descriptor that holds its flock.
_held_staging: dict[Path, int] = {}


class StoreError(BadInput):
    """A store that cannot be used as asked (a missing version, nothing to roll back to)."""


def is_version_name(name: str) -> bool:
    """True for a canonical version number: the name of a version folder, the content of CURRENT."""
    return _VERSION.fullmatch(name) is not None


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


def current_version(store: Path) -> int | None:
    """The version CURRENT names, None when there is no CURRENT; StoreError when it holds anything
    but a version number (a path such as `../x` included)."""
    try:
        with open(store / CURRENT_NAME, "rb") as handle:
            raw = handle.read(_CURRENT_MAX_BYTES + 1)
    except FileNotFoundError:
        return None
    except NotADirectoryError:
        raise StoreError(f"store {store} is a file, not a folder; give the path of a store folder") from None
    text = raw.decode("ascii", errors="replace").strip()
    if len(raw) > _CURRENT_MAX_BYTES or not is_version_name(text):
        shown = text if len(raw) <= _CURRENT_MAX_BYTES else text[:_CURRENT_MAX_BYTES] + "..."
        raise StoreError(
            f"{store / CURRENT_NAME} holds {shown!r}, not a version number; run `tamis rollback` or write the number of "
            f"a version folder into it"
        )
    return int(text)


def current_artifact(store: Path) -> Path | None:
    version = current_version(store)
    return None if version is None else store / str(version) / ARTIFACT_NAME


def set_current(store: Path, version: int) -> None:
    """Point CURRENT at `version`. Call with the store lock held: temporary files of CURRENT that a
    crashed writer left are removed first (every writer of CURRENT holds the lock)."""
    for stale in store.glob(f".{CURRENT_NAME}.*.tmp"):
        stale.unlink(missing_ok=True)
    write_atomically(store / CURRENT_NAME, [f"{version}\n".encode()])


@contextmanager
def store_lock(store: Path) -> Iterator[None]:
    """Hold the store's lock: a second build waits here until the first has published."""
    _ensure_store(store)
    with open(store / LOCK_NAME, "a+b") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
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


def publish_staging(store: Path, staging: Path, keep: int) -> int:
    """Make a verified staging folder the next version and switch CURRENT to it; returns the version.

    Call with the store lock held. If CURRENT cannot be switched, the folder is renamed back to
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
    """Keep a refused build's folder under refused/ for inspection; CURRENT is left untouched.

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
    """Raise StoreError unless `store` is an existing folder: the commands that read or change a
    store (`tamis versions`, `tamis rollback`) must not take a mistyped path for an empty store."""
    if not store.exists():
        raise StoreError(f"no store at {store}: no such folder; check the path (a store is the folder a build publishes into)")
    if not store.is_dir():
        raise StoreError(f"store {store} is a file, not a folder; give the path of a store folder")


def rollback(store: Path, to: int | None = None) -> int:
    """Put a published version back in service; returns it.

    Without `to`, the newest version older than the one in service; with `to`, that version, older
    or newer than the one in service (so a rollback can be undone).
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
        set_current(store, chosen)
        return chosen
