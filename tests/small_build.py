"""Small, fast builds for the tests of the flow, the gate, drift and the report page.

A small Emberfall corpus and a model grid of one candidate keep a build to a few seconds. The target
is 5%: lookup counts are heavy-tailed, so 12,000 held-out keys carry the information of only a few
hundred unweighted draws, enough to bound 5% but not 1%.
"""

from __future__ import annotations

from pathlib import Path

from tamis.config import BuildConfig, config_from_dict
from tamis.demo import write_demo_corpus

TARGET = 0.05

# one small candidate: 7 leaves, up to 15 trees priced every 5 (the defaults grow six candidates)
SMALL_MODEL = {"leaves": [7], "learning_rates": [0.3], "max_trees": 15, "checkpoint_every": 5}


def write_corpus(directory: Path, members: int = 3000, non_members: int = 40_000, seed: int = 11) -> tuple[Path, Path]:
    """The demo corpus files (members, lookups with counts) in `directory`."""
    return write_demo_corpus(directory, members=members, non_members=non_members, seed=seed)


def first_members(members_path: Path, count: int, into: Path) -> Path:
    """A members file holding the first `count` members of another (the rest are "added later")."""
    lines = members_path.read_text(encoding="utf-8").splitlines(keepends=True)
    into.write_text("".join(lines[:count]), encoding="utf-8")
    return into


def small_config(members: Path, non_members: Path, store: Path, target: float = TARGET, **gate) -> BuildConfig:
    """A build config for these files with the small model grid; `gate` sets [gate] keys."""
    raw = {
        "corpus": {"members": str(members), "non_members": str(non_members)},
        "target": {"fpr": target},
        "model": SMALL_MODEL,
        "gate": gate,
        "store": {"path": str(store)},
    }
    return config_from_dict(raw, Path("/"))
