"""Helpers shared by the tests of bad input, faults, properties and security (not a test module).

`build_artifact` runs the stage functions from features to package on a small corpus;
`plain_build_flow` runs the build flow's own body with every Prefect task replaced by its plain
function, so a test can run a whole build in a fraction of a second of overhead instead of the
10 to 25 s a Prefect start costs, and in a process it may kill at any point.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import lightgbm as lgb
import numpy as np

from tamis.config import BuildConfig, CorpusSettings, GateSettings, ModelSettings, StoreSettings, TargetSettings
from tamis.features import default_feature_spec, featurize
from tamis.filters import build_filters
from tamis.booster import compile_booster
from tamis.model import fit_model
from tamis.package import package_artifact
from tamis.query import region_of
from tamis.regions import RegionSettings, plan_regions
from tamis.trees import score_batch

# A model small enough that training takes well under a second on the small corpora of the tests:
# one candidate of 7-leaf trees, priced every 5 trees up to 10.
SMALL_MODEL = ModelSettings(leaves=(7,), learning_rates=(0.3,), max_trees=10, checkpoint_every=5, patience=1, threads=1)

# The same as a config file for `tamis build`; the gate's change limits are off, so that builds
# of different small corpora into one store are judged on their own.
SMALL_CONFIG_TOML = """\
[model]
leaves = [7]
learning_rates = [0.3]
max_trees = 10
checkpoint_every = 5
patience = 1
threads = 1

[gate]
max_size_growth = 0.0
max_member_drop = 0.0
"""


def snapshot(folder: Path) -> dict:
    """Every path under `folder` with its bytes (None for a folder): equal snapshots, equal stores."""
    if not folder.exists():
        return {}
    return {str(p.relative_to(folder)): (None if p.is_dir() else p.read_bytes()) for p in sorted(folder.rglob("*"))}


def write_lines(path: Path, lines: list[str]) -> Path:
    path.write_text("".join(f"{line}\n" for line in lines), encoding="utf-8")
    return path


def small_config(members: Path, non_members: Path, store: Path, target: float = 0.1, keep: int = 10, **corpus) -> BuildConfig:
    """A BuildConfig for the small corpora of the tests, with SMALL_MODEL and no change limits."""
    return BuildConfig(
        corpus=CorpusSettings(members=members, non_members=non_members, **corpus),
        target=TargetSettings(fpr=target),
        model=SMALL_MODEL,
        gate=dataclasses.replace(GateSettings(), max_size_growth=0.0, max_member_drop=0.0),
        store=StoreSettings(path=store, keep=keep),
    )


@dataclass(frozen=True)
class _Done:
    value: object

    def result(self) -> object:
        return self.value


@dataclass(frozen=True)
class _PlainTask:
    """A task's function, called at once whether called or submitted (`submit(...).result()`)."""

    fn: Callable

    @property
    def name(self) -> str:
        return self.fn.__name__

    def __call__(self, *args):
        return self.fn(*args)

    def submit(self, *args) -> _Done:
        return _Done(self.fn(*args))


@contextmanager
def plain_build_flow() -> Iterator:
    """`tamis.flows.build.build_flow` without Prefect: yields a function with the flow's signature.

    Every Prefect task of the flow module is swapped for the function it wraps, and `quote` (which
    only tells Prefect not to inspect an argument) for the identity, while the context lasts.
    """
    import prefect

    import tamis.flows.build as build

    swapped = {name: _PlainTask(value.fn) for name, value in vars(build).items() if isinstance(value, prefect.Task)}
    swapped["quote"] = lambda value: value
    originals = {name: getattr(build, name) for name in swapped}
    for name, value in swapped.items():
        setattr(build, name, value)
    try:
        yield build.build_flow.fn
    finally:
        for name, value in originals.items():
            setattr(build, name, value)


BASE36 = "abcdefghijklmnopqrstuvwxyz0123456789"


def random_keys(rng, count: int, alphabet: str, low: int, high: int) -> list[str]:
    """`count` random keys of `low` to `high` characters drawn from `alphabet`."""
    lengths = rng.integers(low, high + 1, count)
    letters = rng.integers(0, len(alphabet), int(lengths.sum()))
    text = "".join(alphabet[i] for i in letters)
    ends = lengths.cumsum()
    return [text[end - n : end] for end, n in zip(ends.tolist(), lengths.tolist())]


def write_small_corpus(folder: Path, members: int = 400, non_members: int = 4000, seed: int = 1) -> tuple[Path, Path]:
    """Members are base-36 runs, non-members mostly letter names with a quarter of base-36
    look-alikes: a model separates them well but not perfectly, so an artifact has real regions
    and Bloom filters. One key a line each, no counts."""
    rng = np.random.default_rng(seed)
    member_keys = sorted(set(random_keys(rng, members, BASE36, 8, 12)))
    taken = set(member_keys)
    names = random_keys(rng, non_members - non_members // 4, BASE36[:26], 5, 10)
    lookalikes = random_keys(rng, non_members // 4, BASE36, 8, 12)
    non_member_keys = [k for k in dict.fromkeys(names + lookalikes) if k not in taken]
    folder.mkdir(parents=True, exist_ok=True)
    return write_lines(folder / "members.txt", member_keys), write_lines(folder / "non_members.txt", non_member_keys)


# --- small artifacts, built by the stage functions ---------------------------------------------------

# A model that trains in milliseconds on a few dozen rows and still splits them (one row a leaf).
TINY_MODEL = ModelSettings(leaves=(3,), learning_rates=(0.5,), max_trees=4, checkpoint_every=2, patience=1,
                           threads=1, min_leaf_rows=1)
# Few segments: the validation sets here hold a few dozen keys.
TINY_REGIONS = RegionSettings(segments=16)
HASH_SEED = 0x5EED
PROVENANCE = {"built_at": "2026-12-01T00:00:00Z", "build_id": "property"}


def train_forest(X_members, X_train, train_counts, X_validation, validation_counts, target, how):
    """The model: chosen by artifact bytes through tamis.model.fit_model ("chosen", which on
    corpora this small mostly picks no tree at all), or a LightGBM booster of `how` trees grown
    as is and compiled by tamis.booster.compile_booster."""
    if how == "chosen":
        def filter_bytes(member_scores, val_scores, val_weights) -> float:
            return plan_regions(member_scores, val_scores, val_weights, target, TINY_REGIONS).estimated_total_bits / 8

        return fit_model(X_members, X_train, train_counts, X_validation, validation_counts, filter_bytes, TINY_MODEL).forest
    X = np.vstack([X_members, X_train])
    labels = np.r_[np.ones(len(X_members)), np.zeros(len(X_train))]
    params = {"objective": "binary", "num_leaves": 4, "learning_rate": 0.5, "min_data_in_leaf": 1,
              "verbose": -1, "num_threads": 1, "seed": 1, "deterministic": True}
    booster = lgb.train(params, lgb.Dataset(X, labels, weight=np.r_[np.ones(len(X_members)), train_counts]),
                        num_boost_round=how)
    return compile_booster(booster)


def build_artifact(path, corpus, target: float, how, plan=None, provenance: dict | None = None) -> int:
    """The flow's stages in order, in-process: features, model, regions, filters, package.

    `corpus` is (members, training non-members, their counts, validation non-members, their
    counts); `how` as in train_forest; `plan(member_scores, validation_scores)`, when given, picks
    (boundaries, budgets) instead of tamis.regions. Returns the number of regions."""
    members, train, train_counts, validation, validation_counts = corpus
    spec = default_feature_spec()
    X_members, X_train, X_validation = (featurize(keys, spec) for keys in (members, train, validation))
    forest = train_forest(X_members, X_train, train_counts, X_validation, validation_counts, target, how)
    member_scores, val_scores = score_batch(forest, X_members), score_batch(forest, X_validation)
    if plan is None:
        chosen = plan_regions(member_scores, val_scores, validation_counts, target, TINY_REGIONS)
        boundaries, fprs = chosen.boundaries, chosen.fprs
    else:
        boundaries, fprs = plan(member_scores, val_scores)
    filters = build_filters(members, region_of(member_scores, boundaries), fprs, HASH_SEED)
    package_artifact(path, feature_spec=spec, forest=forest, boundaries=boundaries,
                     region_filters=filters, hash_seed=HASH_SEED, provenance=provenance or PROVENANCE)
    return len(boundaries) + 1


# The start of a `python -c` script that makes the top-level packages named in sys.argv[1] (commas)
# impossible to import, as on a machine where they are not installed.
REFUSE_IMPORTS = """
import importlib.abc, sys
BLOCKED = set(sys.argv[1].split(","))

class Refuse(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path=None, target=None):
        if name.split(".")[0] in BLOCKED:
            raise ImportError(f"{name} is blocked in this test")
        return None

sys.meta_path.insert(0, Refuse())
"""
