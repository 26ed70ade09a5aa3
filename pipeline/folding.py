"""Fold stage: a build's side of the members added between builds (`tamis.additions`), and what a
build may replace in its store.

- `read_pending`: the batches of the store up to now, read under the additions lock, so that the
  highest number read ("folded through N", recorded in the artifact's provenance and the report)
  is a point after which every batch is still pending: a batch written while the build runs gets a
  higher number, is not folded in and is served on top of the new version.
- Added keys become members of the build, whatever the export says. Those the export lacks are
  counted (`added_not_in_export`): they stay members (never a silent "no"); the count says the
  export or the additions are wrong.
- `retire`: once published, the batches that every kept version has folded in are removed (the
  highest such number is written to RETIRED first, so numbers are never reused). A refused build
  retires nothing.
- `unchanged_version`: the version in service was built from identical inputs (corpus and
  additions, config, tool): the build publishes nothing and says so.
- `newer_inputs_reason`: a version published while this build ran (a racing build) was built from
  a members export modified later than this build's: the build is refused unless told to replace
  it. A build started after a version was published replaces it whatever its export's time: that
  is a deliberate rebuild, judged by the gate's member-drop rule.
"""

from __future__ import annotations

import datetime as dt
import json
import time
from dataclasses import dataclass
from pathlib import Path

from tamis import additions, publish
from tamis.corpus import source_files
from tamis.artifact import ArtifactError, fsync_directory, load_artifact, write_atomically
from tamis.errors import BadInput

# What makes two builds' inputs identical: the provenance fields that fix the artifact's content.
# A temporary batch file older than this was left by a killed `tamis add` (one lives milliseconds).
STALE_TEMPORARY_SECONDS = 3600.0

IDENTITY_FIELDS = ("corpus_digest", "config_digest", "additions_through", "tool_version")


@dataclass(frozen=True)
class Pending:
    """The added keys a build folds in: those of every batch numbered up to `through`."""

    through: int
    batches: int
    keys: list[bytes]


def read_pending(store: Path) -> Pending:
    """Every batch of the store now, read whole under the additions lock; BadInput for a batch
    that cannot be trusted (a build never drops one silently)."""
    if not additions.folder_of(store).is_dir():  # nothing was ever added: the store stays untouched
        return Pending(0, 0, [])
    with additions.additions_lock(store):
        found = additions.listed(store)
        through = max([additions.retired_through(store), *(number for number, _, _ in found)])
        try:
            keys = dict.fromkeys(key for _, path, _ in found for key in additions.read_batch(path))
        except additions.BatchError as error:
            raise BadInput(f"{error}; restore it or remove it (its keys are then no longer added members)") from None
    return Pending(through, len(found), list(keys))


def report_fields(pending: Pending, added_not_in_export: int) -> dict:
    """The report's `additions`: how far the build read, how many keys it folded in, and how many
    of them the export lacks (kept as members)."""
    return {"folded_through": pending.through, "batches": pending.batches, "keys": len(pending.keys),
            "not_in_export": added_not_in_export}


def folded_through_of(folder: Path) -> int:
    """How far the build of a version folder read the store's batches (0 before additions, and for
    an artifact that cannot be read: nothing is retired on its account)."""
    try:
        return additions.folded_through(load_artifact(folder / publish.ARTIFACT_NAME).header)
    except ArtifactError:
        return 0


def retire(store: Path) -> int:
    """Remove the batches every published version has folded in; returns the highest number
    retired. Call with the store lock held, after a publish."""
    kept = publish.published_versions(store)
    if not kept:
        return additions.retired_through(store)
    point = min(folded_through_of(store / str(version)) for version in kept)
    with additions.additions_lock(store) as folder:
        retired = additions.retired_through(store)
        if point > retired:
            write_atomically(folder / additions.RETIRED_NAME, [f"{point}\n".encode()])
            retired = point
        for number, path, _ in additions.listed(store):
            if number <= retired:
                path.unlink(missing_ok=True)
        for leftover in folder.glob(".*.tmp"):  # what a killed `tamis add` left: never read, gone after an hour
            if time.time() - leftover.stat().st_mtime > STALE_TEMPORARY_SECONDS:
                leftover.unlink(missing_ok=True)
        fsync_directory(folder)
    return retired


def _report_in_service(store: Path) -> tuple[int, dict] | None:
    version = publish.current_version(store) if store.is_dir() else None
    if version is None:
        return None
    try:
        return version, json.loads((store / str(version) / publish.REPORT_NAME).read_text())
    except (OSError, ValueError):
        return None


def unchanged_version(store: Path, provenance: dict) -> int | None:
    """The version in service when its artifact (which must open) was built from the same inputs
    as `provenance` describes; what crashed builds left in the store is cleared then, as a publish
    would have."""
    if not store.is_dir():
        return None
    with publish.store_lock(store):
        version = publish.current_version(store)
        if version is None:
            return None
        try:
            theirs = load_artifact(store / str(version) / publish.ARTIFACT_NAME).header.get("provenance")
        except ArtifactError:
            return None
        if not isinstance(theirs, dict) or any(theirs.get(name) != provenance.get(name) for name in IDENTITY_FIELDS):
            return None
        publish.clear_crash_leftovers(store)
        return version


def members_modified_ns(path: Path) -> int:
    """When the members export last changed: its modification time, the latest of its partitions'
    for a folder or pattern of partitions (tamis.corpus.source_files)."""
    return max(entry.stat().st_mtime_ns for entry in source_files(path))


def inputs_fields(members: Path) -> dict:
    """The report's `inputs`: when the members export was modified (what a racing build compares)."""
    ns = members_modified_ns(members)
    at = dt.datetime.fromtimestamp(ns / 1e9, tz=dt.timezone.utc).isoformat(timespec="milliseconds")
    return {"members_modified_ns": ns, "members_modified_at": at.replace("+00:00", "Z")}


def newest_version(store: Path) -> int:
    """The newest version published in the store (0 for none): a build notes it as it starts."""
    return max(publish.published_versions(store), default=0)


def newer_inputs_reason(store: Path, inputs: dict, newest_at_start: int) -> str | None:
    """Why this build must not replace the version in service: published while this build ran
    (numbered above `newest_at_start`) and built from a later members export; else None. Call with
    the store lock held."""
    found = _report_in_service(store)
    if found is None or found[0] <= newest_at_start:
        return None
    version, report = found
    theirs = report.get("inputs", {})
    if not isinstance(theirs.get("members_modified_ns"), int) or theirs["members_modified_ns"] <= inputs["members_modified_ns"]:
        return None
    return (
        f"older_inputs: version {version} in service was built from a members export modified at "
        f"{theirs['members_modified_at']}, later than this build's ({inputs['members_modified_at']}); publishing would "
        f"put older members back in service. Rebuild from the newer export, or pass --replace-newer to publish anyway"
    )

