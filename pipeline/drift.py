"""Drift: how the version in service fares on today's corpus.

Every build opens the store's artifact in service with the loader a service uses and measures it the
way verify measures the new one: the members of today's corpus it answers "no" to (keys added since
it was built; it held every member of its own corpus) and its false-positive rate on today's
lookups, heavy keys answered exactly and the tail bounded on held-out light keys. The split of light
keys is a seeded hash of the key, so with an unchanged corpus.split_seed today's held-out keys were
held out of the old build too (unless they were heavy then) and its rate on them is honest. The figures say what rebuilding buys; the change limits of the gate compare against the
same version (`verify.Baseline`).

A version in service that cannot be opened or evaluated is reported with the reason; it never stops
the build (a new version is then the fix).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from tamis import publish
from tamis.artifact import ArtifactError
from tamis.corpus import Corpus
from tamis.loader import open_filter
from tamis.verify import Baseline, Measurement, check_filter


@dataclass(frozen=True)
class Drift:
    """The version in service against today's corpus.

    `current_version` is None when the store has none in service (or its pointer is unreadable);
    `error` says why it could not be evaluated. The figures are set only when it was.
    """

    current_version: int | None
    error: str | None = None
    artifact_bytes: int | None = None
    members_built: int | None = None
    members_checked: int | None = None
    members_missed: int | None = None
    heldout: Measurement | None = None

    @property
    def status(self) -> str:
        """"none" (nothing in service), "unreadable" (it could not be evaluated) or "evaluated"."""
        if self.error is not None:
            return "unreadable"
        return "none" if self.current_version is None else "evaluated"

    @property
    def members_missed_share(self) -> float | None:
        if self.members_missed is None:
            return None
        return self.members_missed / self.members_checked if self.members_checked else 0.0

    def baseline(self) -> Baseline | None:
        """What the gate's change limits compare with; None unless the version was evaluated."""
        if self.status != "evaluated":
            return None
        return Baseline(self.current_version, self.artifact_bytes, self.members_built)

    def as_report(self) -> dict:
        held = self.heldout
        return {
            "status": self.status,
            "current_version": self.current_version,
            "error": self.error,
            "artifact_bytes": self.artifact_bytes,
            "members_built": self.members_built,
            "members_missed": self.members_missed,
            "members_missed_share": self.members_missed_share,
            "heldout_fpr": None if held is None else held.fpr,
            "heldout_fpr_upper": None if held is None else held.fpr_upper,
            "heldout": None if held is None else held.as_report(),
        }


def measure_drift(store: Path, corpus: Corpus, confidence: float) -> Drift:
    """Open the store's artifact in service and measure it on today's members, heavy keys and held-out
    light keys, with the estimator and bound the gate uses (`tamis.verify.check_filter`).

    Call it with the store lock held, so that the version measured is the one a publish replaces.
    """
    try:
        version = publish.current_version(store)
    except publish.StoreError as exc:
        return Drift(None, error=str(exc))
    if version is None:
        return Drift(None)
    path = publish.current_artifact(store)
    try:
        loaded = open_filter(path)
        size = path.stat().st_size
        built_with = sum(int(region["members"]) for region in loaded.info["regions"])
        checked = check_filter(loaded, corpus, confidence)
    # the loader raises ArtifactError for any file it cannot use; OSError covers a file that
    # vanished after opening, and ValueError / KeyError / TypeError a header it accepted but
    # that this version of the tool cannot evaluate. None of them is a reason to stop the build.
    except (ArtifactError, OSError, ValueError, KeyError, TypeError) as exc:
        return Drift(version, error=f"version {version} ({path}) cannot be evaluated: {exc}")
    return Drift(
        current_version=version,
        artifact_bytes=size,
        members_built=built_with,
        members_checked=checked.members_checked,
        members_missed=checked.false_negatives,
        heldout=checked.heldout,
    )
