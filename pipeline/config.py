"""Build configuration: plain frozen data read from TOML, checked key by key before anything runs.

A config file has these tables (every key optional unless marked; `configs/demo.toml` shows them all):

    [corpus]   members*, non_members* (paths, relative to the config file), key_column, count_column,
               key_encoding, max_key_bytes, conflicts, split_seed, validation_share, heldout_share,
               heavy_count
    [target]   fpr*
    [model]    the fields of ModelSettings (how tamis.model trains and chooses)
    [regions]  the fields of tamis.regions.RegionSettings
    [filters]  hash_seed
    [gate]     the fields of GateSettings
    [store]    path*, keep
    [schedule] cron, timezone
    [compute]  chunk_keys, cluster (a Dask scheduler's address; empty runs on this machine)

An unknown key, a wrong type or a value out of range is a ConfigError that names the key path and
what is allowed.
"""

from __future__ import annotations

import dataclasses
import math
import tomllib
import typing
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from tamis.errors import BadInput
from tamis.format import MAX_TREE_LEAVES, MAX_TREES
from tamis.keylines import DEFAULT_MAX_KEY_BYTES
from tamis.regions import RegionSettings


class ConfigError(BadInput):
    """A config value that cannot be used; the message names the key path and the allowed values."""


# The column of lookup counts a non-member table is read with unless corpus.count_column names another.
DEFAULT_COUNT_COLUMN = "count"


@dataclass(frozen=True)
class CorpusSettings:
    members: Path | None = None
    non_members: Path | None = None
    # the columns of a table source (CSV, Parquet, NDJSON): the keys, and the non-members' lookup
    # counts; an empty count_column reads no counts (every key looked up once)
    key_column: str = "key"
    count_column: str = DEFAULT_COUNT_COLUMN
    # "utf-8": keys must be valid UTF-8 text; "bytes": keys are taken as raw bytes
    key_encoding: str = field(default="utf-8", metadata={"choices": ("utf-8", "bytes")})
    max_key_bytes: int = field(default=DEFAULT_MAX_KEY_BYTES, metadata={"range": (1, 1 << 20)})
    # a key listed as both member and non-member: "member" keeps it a member (it can never be a
    # false negative) and counts it in the report; "error" refuses the corpus
    conflicts: str = field(default="member", metadata={"choices": ("member", "error")})
    split_seed: int = field(default=0x7A31, metadata={"range": (0, (1 << 64) - 1)})
    validation_share: float = field(default=0.3, metadata={"range": (0.05, 0.9)})
    heldout_share: float = field(default=0.3, metadata={"range": (0.05, 0.9)})
    # tau: non-members looked up at least this many times in the window are heavy, answered exactly
    # rather than sampled (tamis.corpus.heavy_cutoff); 0 lets the build choose (44: see there)
    heavy_count: int = field(default=0, metadata={"range": (0, 1 << 53)})
    # when non_members is a folder of lookup sample files written by served filters
    # (tamis.traffic), the files whose period ended at most this many days before the build
    sample_days: float = field(default=7.0, metadata={"range": (0.0, 3650.0)})

    def __post_init__(self) -> None:
        if not self.key_column:
            raise ValueError("key_column must name the column of keys")
        if self.key_column == self.count_column:
            raise ValueError(f"key_column and count_column must be different columns, both are {self.key_column!r}")
        if self.validation_share + self.heldout_share > 0.9:
            raise ValueError("validation_share + heldout_share must leave at least 0.1 of the non-members for training")
        if self.heavy_count == 1:
            raise ValueError("heavy_count must be 0 (automatic) or at least 2: at 1 every key would be heavy and none left to sample")


# Training weight of a non-member as a function of its lookup count.
WEIGHTINGS: dict[str, Callable[[np.ndarray], np.ndarray]] = {
    "none": np.ones_like,
    "raw": np.asarray,
    "sqrt": np.sqrt,
    "log1p": np.log1p,
}


@dataclass(frozen=True)
class ModelSettings:
    """How the model stage trains and chooses. Defaults suit the demo (200k members, ~1M non-members)."""

    seed: int = 0
    threads: int = field(default=2, metadata={"range": (1, 256)})
    # Training non-members drawn (uniformly, seeded) when there are more; all members always train.
    train_nonmembers: int = field(default=300_000, metadata={"range": (1, 10**9)})
    # Candidate capacities: every (leaves, learning rate) pair is grown and priced. On the demo
    # corpus (1% target, 480 node tests a key, log1p weights, seed 0) large trees at high rates won:
    # best totals 85.9k bytes for 31 leaves at rate 0.5, 87.9k for 63 at 0.5, 90.2k for 15 at 0.5,
    # 91.5k for 31 at 0.25; rate 0.7 gave 87.4k and 1.0 90.2k (another seed moves each by ~4%).
    # This grid chose 63 leaves at 0.6: 7 trees, 85.9k bytes against 240.2k for a plain Bloom filter.
    leaves: tuple[int, ...] = (31, 63)
    learning_rates: tuple[float, ...] = (0.3, 0.6)
    max_trees: int = field(default=200, metadata={"range": (1, MAX_TREES)})
    # Query-cost budget: the most node tests per key. The batch evaluator tests every internal node
    # of every tree (trees x (leaves - 1)); 480 allows e.g. 32 trees of 16 leaves.
    max_nodes_per_key: int = field(default=480, metadata={"range": (1, 10**7)})
    checkpoint_every: int = field(default=5, metadata={"range": (1, 100_000)})
    # Stop growing a candidate after this many checkpoints without a cheaper total.
    patience: int = field(default=3, metadata={"range": (1, 1000)})
    # Non-member training weights: WEIGHTINGS[weighting](lookup count), then scaled to sum to the
    # member count (balanced classes). Measured on the demo corpus (31 leaves, rate 0.5, seeds 0
    # and 1): log1p 85.9k / 89.9k total bytes, none 87.0k / 91.3k, sqrt 88.4k / 92.5k, raw 95.4k.
    weighting: str = field(default="log1p", metadata={"choices": tuple(WEIGHTINGS)})
    # LightGBM's histogram bins per feature (fewer bins train faster), its smallest leaf, and the
    # share of features each tree may split on (drawn per tree from the seed; on the demo, 0.5
    # trained 25% faster than 1.0 for the same bytes).
    max_bin: int = field(default=63, metadata={"range": (2, 255)})
    min_leaf_rows: int = field(default=20, metadata={"range": (1, 10**9)})
    feature_fraction: float = field(default=0.5, metadata={"range": (0.01, 1.0)})

    def __post_init__(self) -> None:
        if self.weighting not in WEIGHTINGS:
            raise ValueError(f"weighting must be one of {sorted(WEIGHTINGS)}, got {self.weighting!r}")
        for name in ("threads", "train_nonmembers", "max_trees", "max_nodes_per_key", "checkpoint_every", "patience"):
            if getattr(self, name) < 1:
                raise ValueError(f"model setting {name} must be at least 1, got {getattr(self, name)}")
        if not self.leaves or not all(2 <= n <= MAX_TREE_LEAVES for n in self.leaves):
            raise ValueError(f"model setting leaves must list values from 2 to {MAX_TREE_LEAVES}, got {self.leaves}")
        if not self.learning_rates or not all(0 < r <= 1 for r in self.learning_rates):
            raise ValueError(f"model setting learning_rates must list values in (0, 1], got {self.learning_rates}")
        if self.max_nodes_per_key < min(self.leaves) - 1:
            raise ValueError(
                f"max_nodes_per_key {self.max_nodes_per_key} is below one tree of {min(self.leaves)} leaves "
                f"({min(self.leaves) - 1} node tests); raise it or lower the leaves"
            )


@dataclass(frozen=True)
class TargetSettings:
    fpr: float = field(default=0.01, metadata={"range": (1e-9, 0.5)})


@dataclass(frozen=True)
class GateSettings:
    """The rules a build must pass to be published; each refusal names its rule.

    Every limit below reads 0 as "off". The two change limits compare the new artifact with the
    version in service (`STORE/IN_SERVICE`) and apply only when there is one that opens.
    """

    # the confidence of the one-sided upper bound on the held-out false-positive rate
    confidence: float = field(default=0.95, metadata={"range": (0.5, 0.999999)})
    # rule fpr_upper: the gate passes while the upper bound is at most target * (1 + fpr_slack)
    fpr_slack: float = field(default=0.0, metadata={"range": (0.0, 10.0)})
    # the build aims below the target by this many standard errors of the held-out estimate, on top
    # of the confidence bound, so that a build on target passes the gate with high probability
    aim_sigmas: float = field(default=2.0, metadata={"range": (0.0, 10.0)})
    # rule min_heldout, checked before training: the held-out part must carry at least this many
    # draws (its effective sample size when the corpus has counts), and never fewer than the target
    # needs to be bounded at all (tamis.verify.needed_heldout); 0 asks for no more than that
    min_heldout: int = field(default=0, metadata={"range": (0, 1 << 40)})
    # rule max_artifact_bytes: the largest artifact file accepted
    max_artifact_bytes: int = field(default=0, metadata={"range": (0, 1 << 40)})
    # rule max_size_growth: the artifact may be at most this share larger than the version in
    # service (0.5: at most +50% bytes). On by default: nightly growth is a few percent, and a ban
    # wave of a third more members still passes, while a model that stopped separating (the
    # artifact falling back towards a plain Bloom filter, about twice the learned size in the
    # demo) is caught before it ships.
    max_size_growth: float = field(default=0.5, metadata={"range": (0.0, 1000.0)})
    # rule max_member_drop: the member count may fall by at most this share against the version in
    # service (0.2: at most 20% fewer). On by default: a filter's "no" is trusted, so a truncated
    # export would let every dropped member through unchecked; unbans shrink a list slowly.
    max_member_drop: float = field(default=0.2, metadata={"range": (0.0, 1.0)})
    # rule model_pays: what a build does when its learned artifact is not smaller than the plain
    # filter (no model, one region, the same aim) it would replace: "publish" the learned one and
    # say so, "publish_plain" publish the plain filter instead, or "refuse" both. Either artifact
    # opens with the same loader.
    when_model_does_not_pay: str = field(default="publish", metadata={"choices": ("publish", "publish_plain", "refuse")})
    # rule max_unlike_rate: the largest share of "maybe" the artifact may give any family of keys
    # unlike the sample (tamis.probes: random strings, members with a character changed, hex
    # digests, numbers, host names); 0 is off. A cap (regions.max_region_fpr) is how to meet it.
    max_unlike_rate: float = field(default=0.0, metadata={"range": (0.0, 1.0)})


@dataclass(frozen=True)
class FilterSettings:
    # seeds the xxh3-128 hash of every backup filter; stored in the artifact, so any value works
    hash_seed: int = field(default=0x7A3115, metadata={"range": (0, (1 << 64) - 1)})
    # variants of each region's filter tried to spare the heavy keys (tamis.hot_keys); the best of
    # 8 lets the aim take no room for the luck of hashing on heavy keys (tamis.verify.aim_fpr).
    # Each variant costs one more insertion of the region's members; 1 turns the choice off.
    variants: int = field(default=8, metadata={"range": (1, 64)})


@dataclass(frozen=True)
class StoreSettings:
    path: Path | None = None
    keep: int = field(default=10, metadata={"range": (1, 100_000)})


@dataclass(frozen=True)
class ScheduleSettings:
    cron: str = "0 2 * * *"
    timezone: str = "UTC"


@dataclass(frozen=True)
class ComputeSettings:
    # Keys per chunk of the per-chunk stages (features, scoring, filter insertion, verification):
    # each chunk is one task, so a chunk is the unit of progress and of work sent to a cluster.
    # The values never depend on it. 2^20 keys hold about 0.4 GB of features.
    chunk_keys: int = field(default=1 << 20, metadata={"range": (1, 1 << 30)})
    # Address of a Dask scheduler ("tcp://host:8786"); empty: run on this machine.
    cluster: str = ""


@dataclass(frozen=True)
class BuildConfig:
    corpus: CorpusSettings = CorpusSettings()
    target: TargetSettings = TargetSettings()
    model: ModelSettings = ModelSettings()
    regions: RegionSettings = RegionSettings()
    filters: FilterSettings = FilterSettings()
    gate: GateSettings = GateSettings()
    store: StoreSettings = StoreSettings()
    schedule: ScheduleSettings = ScheduleSettings()
    compute: ComputeSettings = ComputeSettings()


def _coerce(value: Any, annotation: Any, where: str, base: Path) -> Any:
    """Check `value` against a field's type; paths resolve against the config file's folder."""
    args = typing.get_args(annotation)
    if Path in args or annotation is Path:
        if not isinstance(value, str) or not value:
            raise ConfigError(f"config key {where} must be a non-empty path string, got {value!r}")
        return (base / value).resolve()
    if annotation is bool:
        if not isinstance(value, bool):
            raise ConfigError(f"config key {where} must be true or false, got {value!r}")
        return value
    if annotation is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise ConfigError(f"config key {where} must be an integer, got {value!r}")
        return value
    if annotation is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise ConfigError(f"config key {where} must be a finite number, got {value!r}")
        return float(value)
    if annotation is str:
        if not isinstance(value, str):
            raise ConfigError(f"config key {where} must be a string, got {value!r}")
        return value
    origin = typing.get_origin(annotation)
    if origin is tuple:
        if not isinstance(value, list) or not value:
            raise ConfigError(f"config key {where} must be a non-empty list, got {value!r}")
        inner = args[0]
        return tuple(_coerce(v, inner, f"{where}[{i}]", base) for i, v in enumerate(value))
    raise ConfigError(f"config key {where} has a type this reader does not know ({annotation})")


def percent_meant(value: Any, low: float, high: float) -> float | None:
    """The fraction a user most likely meant by an out-of-range rate typed as a percentage (5 for
    0.05, 1 for 0.01): value / 100 when the value is at least 1, the field's range stops below 1,
    and value / 100 lies in it; None when no reading is obvious."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or high >= 1 or value < 1:
        return None
    meant = value / 100
    return meant if low <= meant <= high else None


def _check_limits(value: Any, meta: typing.Mapping, subject: str) -> None:
    """Refuse a value outside its field's range or choices; `subject` names where it was given
    ("config key target.fpr", "option --target-fpr")."""
    if "range" in meta:
        low, high = meta["range"]
        if not low <= value <= high:
            meant = percent_meant(value, low, high)
            hint = "" if meant is None else f"; did you mean {meant:g} ({value:g}%)?"
            raise ConfigError(f"{subject} must be between {low} and {high}, got {value!r}{hint}")
    if "choices" in meta and value not in meta["choices"]:
        allowed = ", ".join(repr(c) for c in meta["choices"])
        raise ConfigError(f"{subject} must be one of {allowed}, got {value!r}")


def _build_section(cls: type, table: Any, where: str, base: Path) -> Any:
    if not isinstance(table, dict):
        raise ConfigError(f"config key {where} must be a table, got {table!r}")
    hints = typing.get_type_hints(cls)
    fields = {f.name: f for f in dataclasses.fields(cls)}
    values = {}
    for name, value in table.items():
        if name not in fields:
            allowed = ", ".join(sorted(fields))
            raise ConfigError(f"unknown config key {where}.{name} (allowed in [{where}]: {allowed})")
        values[name] = _coerce(value, hints[name], f"{where}.{name}", base)
        _check_limits(values[name], fields[name].metadata, f"config key {where}.{name}")
    try:
        return cls(**values)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"config table [{where}]: {exc}") from None


def config_from_dict(raw: dict, base: Path) -> BuildConfig:
    """A BuildConfig from a parsed TOML document; relative paths resolve against `base`."""
    sections = {f.name: f.type for f in dataclasses.fields(BuildConfig)}
    hints = typing.get_type_hints(BuildConfig)
    built = {}
    for name, table in raw.items():
        if name not in sections:
            raise ConfigError(f"unknown config table [{name}] (allowed: {', '.join(sections)})")
        built[name] = _build_section(hints[name], table, name, base)
    return BuildConfig(**built)


def load_config(path: Path) -> BuildConfig:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"cannot read config {path}: {exc.strerror}; check the path") from None
    except UnicodeDecodeError:
        raise ConfigError(f"config {path} is not UTF-8 text") from None
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config {path} is not valid TOML: {exc}") from None
    return config_from_dict(raw, path.parent)


# The command-line options that set config keys (`tamis build`, `tamis demo`).
OPTIONS = {
    "corpus.members": "--members",
    "corpus.non_members": "--non-members",
    "corpus.key_encoding": "--key-encoding",
    "corpus.key_column": "--key-column",
    "corpus.count_column": "--count-column",
    "target.fpr": "--target-fpr",
    "store.path": "--store",
    "compute.cluster": "--cluster",
}


def _subject(where: str) -> str:
    """How a message names a value given for config key `where`: the option that sets it, if any."""
    return f"option {OPTIONS[where]}" if where in OPTIONS else f"config key {where}"


def with_overrides(config: BuildConfig, **sections: dict) -> BuildConfig:
    """A copy of `config` with some fields of some sections replaced by the CLI's plain options;
    a value out of range is refused naming the option that gave it (`OPTIONS`)."""
    changes = {}
    for name, fields in sections.items():
        given = {k: v for k, v in fields.items() if v is not None}
        if given:
            section = getattr(config, name)
            for key, value in given.items():
                meta = {f.name: f for f in dataclasses.fields(section)}[key].metadata
                _check_limits(value, meta, _subject(f"{name}.{key}"))
            try:
                changes[name] = dataclasses.replace(section, **given)
            except ValueError as exc:
                raise ConfigError(f"options for [{name}]: {exc}") from None
    return dataclasses.replace(config, **changes)


def require_paths(config: BuildConfig) -> None:
    """The three paths a build cannot run without."""
    for where, value in (("corpus.members", config.corpus.members), ("corpus.non_members", config.corpus.non_members), ("store.path", config.store.path)):
        if value is None:
            raise ConfigError(f"no {where} given: set it in the config or pass {OPTIONS[where]}")
