"""Publish stage: the store of versions, and the atomic switch of the version in service.

    STORE/
      CURRENT            the version in service, as a decimal number and a newline
      1/ 2/ 3/ ...       published versions: artifact.tamis and report.json
      refused/<build>/   builds the gate refused, kept with their report for inspection
      .staging-<build>/  a build in progress (removed or renamed when it ends)
      .lock              held while a build publishes

A version folder appears by one rename of a complete staging folder, and CURRENT changes by one
rename of a complete temporary file; both are fsynced, so after a crash at any point CURRENT names
either the old or the new version, never a torn one (invariant 4).
"""

from __future__ import annotations

import fcntl
import json
import os
import shutil
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from pipeline.errors import BadInput

ARTIFACT_NAME = "artifact.tamis"
REPORT_NAME = "report.json"
CURRENT_NAME = "CURRENT"


class StoreError(BadInput):
    """A store that cannot be used as asked (a missing version, nothing to roll back to)."""


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def published_versions(store: Path) -> list[int]:
    if not store.is_dir():
        return []
    return sorted(int(p.name) for p in store.iterdir() if p.name.isdigit() and (p / ARTIFACT_NAME).is_file())


def current_version(store: Path) -> int | None:
    try:
        text = (store / CURRENT_NAME).read_text().strip()
    except FileNotFoundError:
        return None
    if not text.isdigit():
        raise StoreError(f"{store / CURRENT_NAME} holds {text!r}, not a version number; run `tamis rollback` or fix it by hand")
    return int(text)


def current_artifact(store: Path) -> Path | None:
    version = current_version(store)
    return None if version is None else store / str(version) / ARTIFACT_NAME


def write_atomically(path: Path, data: bytes) -> None:
    """Write `data` to `path` through a fsynced temporary file and one rename."""
    temporary = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(temporary, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(temporary, path)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)


def set_current(store: Path, version: int) -> None:
    write_atomically(store / CURRENT_NAME, f"{version}\n".encode())


@contextmanager
def store_lock(store: Path) -> Iterator[None]:
    """Hold the store's lock: a second build waits here until the first has published."""
    store.mkdir(parents=True, exist_ok=True)
    with open(store / ".lock", "a+b") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def new_staging(store: Path, build_id: str) -> Path:
    """An empty staging folder for one build; stale ones of crashed builds are removed first."""
    store.mkdir(parents=True, exist_ok=True)
    for stale in store.glob(".staging-*"):
        shutil.rmtree(stale, ignore_errors=True)
    staging = store / f".staging-{build_id}"
    staging.mkdir()
    return staging


def write_report(folder: Path, report: dict) -> None:
    write_atomically(folder / REPORT_NAME, (json.dumps(report, indent=2, sort_keys=True) + "\n").encode())


def publish_staging(store: Path, staging: Path, keep: int) -> int:
    """Make a verified staging folder the next version and switch CURRENT to it; returns the version.

    Call with the store lock held. Versions beyond the newest `keep` are removed, never the current one.
    """
    versions = published_versions(store)
    version = (versions[-1] if versions else 0) + 1
    _fsync_dir(staging)
    os.rename(staging, store / str(version))
    _fsync_dir(store)
    set_current(store, version)
    for old in published_versions(store)[:-keep]:
        if old != version:
            shutil.rmtree(store / str(old), ignore_errors=True)
    return version


def refuse_staging(store: Path, staging: Path, build_id: str) -> Path:
    """Keep a refused build's folder under refused/ for inspection; CURRENT is left untouched."""
    refused = store / "refused"
    refused.mkdir(exist_ok=True)
    target = refused / build_id
    os.rename(staging, target)
    return target


def rollback(store: Path) -> int:
    """Make the published version before the current one current again; returns it."""
    with store_lock(store):
        current = current_version(store)
        older = [v for v in published_versions(store) if current is None or v < current]
        if not older:
            raise StoreError(f"{store}: no published version older than {current} to roll back to")
        set_current(store, older[-1])
        return older[-1]
