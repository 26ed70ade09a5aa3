"""The model stage: train a gradient-boosted classifier, pick its capacity by artifact bytes, compile it.

The classifier (LightGBM, binary log-loss) learns members (label 1, every one of them) against a
sample of training non-members (label 0, weighted by their lookup counts). Its capacity is chosen by
the quantity the user pays for: the artifact bytes it leads to, that is the compiled forest's bytes
plus the backup filters it needs at the target false-positive rate. The caller's `filter_bytes`
prices the filters from the compiled integer scores of all members and of validation non-members
the model never trained on. Every candidate (leaves x learning rate) grows tree by tree; at every
checkpoint its prefix is compiled and priced, and the cheapest prefix of all candidates wins.
On a Dask cluster (`fit_model_on_cluster`), LightGBM's Dask interface trains each candidate up to
its tree cap and the same pricing walks its prefixes; dask is imported only there.

Compilation turns LightGBM's trees (`Booster.dump_model()`) into a `tamis.trees.Forest`:
thresholds snapped to float32, leaf values quantised to integers.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field

import lightgbm as lgb
import numpy as np

from tamis.trees import (
    CHILD_DTYPES,
    INT32_LIMIT,
    MAX_TREE_LEAVES,
    MAX_TREES,
    TREE_SPLITS_DTYPES,
    VALUE_DTYPES,
    Forest,
    leaf_indices,
    narrowest_dtype,
)

# Bytes the forest adds to an artifact beyond its sections: its meta in the msgpack header (about
# 50 bytes) and, for each of its 6 sections, a header entry (name, dtype, offset, length, checksum:
# about 50 bytes) plus 32 bytes of 64-byte alignment padding on average. The same for every
# candidate, so it moves the totals, never the choice.
FOREST_OVERHEAD_BYTES = 50 + 6 * (50 + 32)

# Quantisation. Leaf values become round(raw * scale) with scale a power of two, so score / scale
# differs from LightGBM's raw score (log-odds) by at most trees * 0.5 / scale. Each tree's integer
# midpoint moves into the bias, which leaves the sum unchanged and halves the leaf range to store.
# Leaves are int16 when some scale keeps every stored leaf within int16 *and* that worst-case error
# at or below MAX_ROUNDING_ERROR: 2^-10 log-odds is a 0.1% change of the odds, far below the width
# of the score segments the regions stage draws (measured: see tests/test_model.py). Otherwise they
# are int32, at the largest scale for which |bias| + the sum of every tree's largest |leaf| stays
# within int32, so an int32 accumulator can never overflow. MAX_SCALE_LOG2 caps the scale: a step
# of 2^-24 log-odds is below the float32 resolution of any score near 1 and finer ones buy nothing.
MAX_ROUNDING_ERROR = 2.0**-10
MAX_SCALE_LOG2 = 24

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
class ModelChoice:
    """The chosen compiled model and how it was chosen (`candidates`: one row per priced checkpoint)."""

    forest: Forest
    trees: int
    params: dict
    auc: float
    model_bytes: int
    filter_bytes: float
    total_bytes: float
    candidates: list[dict]
    train_seconds: float


@dataclass(frozen=True)
class RawTree:
    """One LightGBM tree in the Forest's local numbering, before quantisation.

    Internal nodes in preorder (so children follow their parents); child codes >= 0 are internal
    nodes, < 0 leaf ~code; leaves keep LightGBM's leaf_index, so leaf numbers match pred_leaf.
    Thresholds and leaf values are LightGBM's doubles.
    """

    feature: tuple[int, ...]
    threshold: tuple[float, ...]
    left: tuple[int, ...]
    right: tuple[int, ...]
    leaf_value: tuple[float, ...]


# Compilation ----------------------------------------------------------------------------------


def float32_at_or_below(threshold: float) -> np.float32:
    """The largest float32 t32 with t32 <= threshold (a double).

    For every float32 x, x <= t32 exactly when x <= threshold in double arithmetic: if x <= t32 then
    x <= threshold, and a float32 x <= threshold is at most the largest such float32, t32.
    """
    with np.errstate(over="ignore"):
        nearest = np.float32(threshold)
    if float(nearest) > threshold:
        return np.nextafter(nearest, np.float32(-np.inf))
    return nearest


def _check_split(node: dict) -> None:
    if node["decision_type"] != "<=":
        raise ValueError(f"only numerical '<=' splits compile; got decision type {node['decision_type']!r} (categorical feature?)")
    # With missing type None or NaN, LightGBM sends every finite value left exactly when value <=
    # threshold; with Zero it sends zeros the default way, which a plain comparison cannot express.
    if node["missing_type"] not in ("None", "NaN"):
        raise ValueError(f"missing type {node['missing_type']!r} does not compile; train with zero_as_missing=false")


def parse_tree(info: dict) -> RawTree:
    """A RawTree from one `dump_model()["tree_info"]` entry; numerical `<=` splits only."""
    root = info["tree_structure"]
    if "leaf_value" in root:
        return RawTree((), (), (), (), (float(root["leaf_value"]),))
    feature: list[int] = []
    threshold: list[float] = []
    children: list[list[int]] = []  # [left code, right code] per internal node
    leaf_value = [math.nan] * int(info["num_leaves"])
    stack: list[tuple[dict, int, int]] = [(root, -1, 0)]  # (node, parent, 0 left / 1 right)
    while stack:
        node, parent, side = stack.pop()
        if "leaf_value" in node:
            code = ~int(node["leaf_index"])
            leaf_value[~code] = float(node["leaf_value"])
        else:
            _check_split(node)
            code = len(feature)
            feature.append(int(node["split_feature"]))
            threshold.append(float(node["threshold"]))
            children.append([0, 0])
            stack.append((node["right_child"], code, 1))
            stack.append((node["left_child"], code, 0))  # popped first: preorder
        if parent >= 0:
            children[parent][side] = code
    if any(math.isnan(v) for v in leaf_value):
        raise ValueError(f"tree {info.get('tree_index')}: leaf indices are not 0..{len(leaf_value) - 1}")
    left, right = (tuple(c[i] for c in children) for i in (0, 1))
    return RawTree(tuple(feature), tuple(threshold), left, right, tuple(leaf_value))


def booster_trees(booster: lgb.Booster, start: int = 0, stop: int | None = None) -> list[RawTree]:
    """Trees start..stop-1 of a binary-objective booster (through the last when stop is None)."""
    count = (booster.num_trees() if stop is None else stop) - start
    if count <= 0:
        return []
    dump = booster.dump_model(start_iteration=start, num_iteration=count)
    if dump["num_tree_per_iteration"] != 1:
        raise ValueError("only single-output (binary) boosters compile")
    return [parse_tree(info) for info in dump["tree_info"]]


def _quantise(leaf_values: Sequence[np.ndarray], scale: int) -> tuple[list[np.ndarray], int]:
    """Stored leaf integers (each tree's rounded values minus their integer midpoint) and the bias."""
    stored, bias = [], 0
    for values in leaf_values:
        rounded = np.rint(values * scale).astype(np.int64)
        midpoint = (int(rounded.max()) + int(rounded.min())) // 2
        stored.append(rounded - midpoint)
        bias += midpoint
    return stored, bias


def choose_scale(leaf_values: Sequence[np.ndarray]) -> tuple[int, np.dtype]:
    """(scale, leaf dtype) for trees with these raw leaf values, by the rule above MAX_ROUNDING_ERROR."""
    int16_max = int(np.iinfo(np.int16).max)
    widest_int32 = None
    for log2 in range(MAX_SCALE_LOG2, -1, -1):
        scale = 1 << log2
        stored, bias = _quantise(leaf_values, scale)
        largest = [int(np.abs(s).max()) for s in stored]
        if abs(bias) + sum(largest) > INT32_LIMIT:
            continue
        widest_int32 = widest_int32 or scale
        if max(largest, default=0) <= int16_max:
            if len(leaf_values) * 0.5 / scale <= MAX_ROUNDING_ERROR:
                return scale, np.dtype("<i2")
            break  # smaller scales only round more coarsely
    if widest_int32 is None:
        raise ValueError("leaf values too large to quantise into int32 scores even at scale 1")
    return widest_int32, np.dtype("<i4")


def compile_trees(trees: Sequence[RawTree], features: int) -> Forest:
    """The Forest of these trees, for feature vectors of length `features`."""
    leaf_values = [np.asarray(t.leaf_value, dtype=np.float64) for t in trees]
    scale, value_dtype = choose_scale(leaf_values)
    stored, bias = _quantise(leaf_values, scale)
    splits = [len(t.feature) for t in trees]
    codes = [c for t in trees for c in (*t.left, *t.right)]
    child_dtype = narrowest_dtype(min(codes, default=0), max(codes, default=0), CHILD_DTYPES)
    return Forest(
        features=features,
        scale=scale,
        bias=bias,
        tree_splits=np.array(splits, dtype=narrowest_dtype(0, max(splits, default=0), TREE_SPLITS_DTYPES)),
        feature=np.array([f for t in trees for f in t.feature], dtype=np.uint8),
        threshold=np.array([float32_at_or_below(x) for t in trees for x in t.threshold], dtype=np.float32),
        left=np.array([c for t in trees for c in t.left], dtype=child_dtype),
        right=np.array([c for t in trees for c in t.right], dtype=child_dtype),
        value=np.concatenate(stored).astype(value_dtype) if trees else np.zeros(0, dtype=VALUE_DTYPES[0]),
    )


def compile_booster(booster: lgb.Booster, trees: int | None = None) -> Forest:
    """The Forest of a binary booster's first `trees` trees (all when None)."""
    return compile_trees(booster_trees(booster, 0, trees), booster.num_feature())


# Measures -------------------------------------------------------------------------------------


def weighted_auc(positive: np.ndarray, negative: np.ndarray, negative_weights: np.ndarray | None = None) -> float:
    """P(score of a random positive > score of a random negative), ties counting one half.

    The Mann-Whitney rank formula, with negatives drawn in proportion to their weights when given.
    """
    negative = np.asarray(negative)
    weights = np.ones(len(negative)) if negative_weights is None else np.asarray(negative_weights, dtype=np.float64)
    if len(positive) == 0 or weights.sum() <= 0:
        raise ValueError("AUC needs at least one positive and a positive total negative weight")
    order = np.argsort(negative, kind="stable")
    cumulative = np.concatenate([[0.0], np.cumsum(weights[order])])
    below = cumulative[np.searchsorted(negative[order], positive, side="left")]
    at_or_below = cumulative[np.searchsorted(negative[order], positive, side="right")]
    return float(np.mean(below + 0.5 * (at_or_below - below)) / cumulative[-1])


# Training and choice --------------------------------------------------------------------------

FilterBytes = Callable[[np.ndarray, np.ndarray, np.ndarray], float]


@dataclass(frozen=True)
class _Priced:
    """One priced checkpoint: its table row, its forest and the scores it was priced on."""

    row: dict
    forest: Forest
    member_scores: np.ndarray
    val_scores: np.ndarray


def training_sample(rows: int, size: int, seed: int) -> np.ndarray:
    """Indices of the training non-members that train, ascending: all `rows` when there are at
    most `size`, else `size` of them drawn uniformly without replacement from a seeded generator."""
    if rows <= size:
        return np.arange(rows)
    return np.sort(np.random.default_rng(seed).choice(rows, size, replace=False))


def _training_rows(X_members, X_train_non, w_train_non, settings: ModelSettings) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(rows, labels, weights): every member (label 1, weight 1), then the training non-members
    (label 0; `train_nonmembers` of them drawn when there are more), weighted by their lookup counts
    through WEIGHTINGS and scaled to sum to the member count."""
    if len(X_train_non) > settings.train_nonmembers:
        pick = training_sample(len(X_train_non), settings.train_nonmembers, settings.seed)
        X_train_non, w_train_non = X_train_non[pick], np.asarray(w_train_non)[pick]
    weights = WEIGHTINGS[settings.weighting](np.asarray(w_train_non, dtype=np.float64))
    weights = weights * (len(X_members) / weights.sum())
    return (
        np.vstack([X_members, X_train_non]),
        np.concatenate([np.ones(len(X_members)), np.zeros(len(X_train_non))]),
        np.concatenate([np.ones(len(X_members)), weights]),
    )


def _training_set(X_members, X_train_non, w_train_non, settings: ModelSettings) -> lgb.Dataset:
    rows, labels, weights = _training_rows(X_members, X_train_non, w_train_non, settings)
    return lgb.Dataset(rows, label=labels, weight=weights, params=_dataset_params(settings), free_raw_data=True)


def _dataset_params(settings: ModelSettings) -> dict:
    return {"max_bin": settings.max_bin, "verbose": -1, "num_threads": settings.threads, "seed": settings.seed}


def _booster_params(leaves: int, learning_rate: float, settings: ModelSettings) -> dict:
    return {
        **_dataset_params(settings),
        "objective": "binary",
        "num_leaves": leaves,
        "learning_rate": learning_rate,
        "min_data_in_leaf": settings.min_leaf_rows,
        "feature_fraction": settings.feature_fraction,
        "deterministic": True,
        "force_col_wise": True,  # LightGBM asks for a fixed histogram layout with deterministic=true
    }


def _tree_cap(leaves: int, settings: ModelSettings) -> int:
    """The most trees a candidate of `leaves` leaves grows: max_trees, and the node budget."""
    return min(settings.max_trees, settings.max_nodes_per_key // (leaves - 1))


@dataclass
class _Scores:
    """Running integer scores of the pricing rows, for a growing prefix of trees.

    The score of a row is the sum over trees of round(raw leaf * scale), which is exactly
    `score_batch` of the compiled prefix (bias + stored leaf = the rounded leaf value, tree by tree).
    While the scale stays the same, a checkpoint adds only its new trees; when it changes, every
    block of leaves is summed again at the new scale.
    """

    scale: int = 0
    blocks: list = field(default_factory=list)  # (trees, leaf matrix of the rows: rows x trees)
    sums: np.ndarray | None = None

    def extend(self, trees: Sequence[RawTree], leaves: np.ndarray, scale: int) -> np.ndarray:
        self.blocks.append((trees, leaves))
        if scale == self.scale:
            self.sums = self.sums + _rounded_sum(trees, leaves, scale)
        else:
            self.scale = scale
            self.sums = sum(_rounded_sum(t, l, scale) for t, l in self.blocks)
        return self.sums


def _rounded_sum(trees: Sequence[RawTree], leaves: np.ndarray, scale: int) -> np.ndarray:
    """Per row, the sum over these trees of round(value of the row's leaf * scale)."""
    rounded = np.rint(np.concatenate([t.leaf_value for t in trees]) * scale).astype(np.int64)
    starts = np.cumsum([0] + [len(t.leaf_value) for t in trees[:-1]])
    return rounded.take(leaves + starts).sum(axis=1)


@dataclass(frozen=True)
class _Pricing:
    """What every checkpoint is priced on: all members and the validation non-members."""

    X_members: np.ndarray
    X_val_non: np.ndarray
    w_val_non: np.ndarray
    filter_bytes: FilterBytes
    clock_start: float

    def price(self, forest: Forest, member_scores, val_scores, leaves, learning_rate) -> _Priced:
        backup = float(self.filter_bytes(member_scores, val_scores, self.w_val_non))
        model_bytes = forest.nbytes + FOREST_OVERHEAD_BYTES
        row = {
            "leaves": leaves,
            "learning_rate": learning_rate,
            "trees": forest.trees,
            "nodes_per_key": forest.nodes_per_key,
            "model_bytes": model_bytes,
            "filter_bytes": backup,
            "total_bytes": model_bytes + backup,
            "seconds": round(time.perf_counter() - self.clock_start, 3),
        }
        return _Priced(row, forest, member_scores, val_scores)

    def baseline(self) -> _Priced:
        """No trees: every key scores the same, so the backup is one plain Bloom filter."""
        forest = compile_trees([], self.X_members.shape[1])
        member_scores = np.full(len(self.X_members), forest.bias, dtype=np.int64)
        val_scores = np.full(len(self.X_val_non), forest.bias, dtype=np.int64)
        return self.price(forest, member_scores, val_scores, None, None)


# A candidate's trees as consecutive blocks, one block per checkpoint (see _price_blocks).
TreeBlocks = Iterator[list[RawTree]]


def _grown_blocks(booster: lgb.Booster, tree_cap: int, every: int) -> TreeBlocks:
    """Grow a booster `every` trees at a time up to `tree_cap`, yielding each block of new trees.

    Lazy: the next block is grown only when asked for, so a candidate that stops on patience costs
    no more trees. Stops early when LightGBM can split no further.
    """
    done, finished = 0, False
    while done < tree_cap and not finished:
        target = min(tree_cap, done + every)
        while booster.current_iteration() < target and not finished:
            finished = booster.update()
        new = booster_trees(booster, done, booster.current_iteration())
        if not new:
            return
        done += len(new)
        yield new


def _trained_blocks(booster: lgb.Booster, every: int) -> TreeBlocks:
    """The trees of a booster already trained to its tree cap, `every` at a time: its prefixes."""
    total = booster.num_trees()
    for start in range(0, total, every):
        yield booster_trees(booster, start, min(total, start + every))


def _price_blocks(blocks: TreeBlocks, leaves: int, learning_rate: float, pricing: _Pricing, settings: ModelSettings) -> list[_Priced]:
    """Compile and price a candidate's prefix after every block of trees, the cheapest total wins.

    Stops after `patience` checkpoints without a cheaper total, or when the blocks run out (the
    tree cap, or LightGBM could split no further). A checkpoint walks the pricing rows through its
    new trees only (see `_Scores`).
    """
    features = pricing.X_members.shape[1]
    trees: list[RawTree] = []
    members, validation = _Scores(), _Scores()
    priced: list[_Priced] = []
    best, stale = math.inf, 0
    for new in blocks:
        trees.extend(new)
        forest = compile_trees(trees, features)
        block = compile_trees(new, features)  # only the new trees walk the rows
        # leaf numbers are below MAX_TREE_LEAVES = 64, so a byte holds each
        member_scores = members.extend(new, leaf_indices(block, pricing.X_members).astype(np.uint8), forest.scale)
        val_scores = validation.extend(new, leaf_indices(block, pricing.X_val_non).astype(np.uint8), forest.scale)
        priced.append(pricing.price(forest, member_scores, val_scores, leaves, learning_rate))
        total = priced[-1].row["total_bytes"]
        stale = 0 if total < best else stale + 1
        best = min(best, total)
        if stale >= settings.patience:
            break
    return priced


def _choose(pricing: _Pricing, blocks: Callable[[int, float], TreeBlocks], train_rows: int, settings: ModelSettings) -> ModelChoice:
    """Price the forest of no trees and every candidate's checkpoints (`blocks(leaves, rate)`
    gives a candidate's trees), and keep the cheapest."""
    priced = [pricing.baseline()] + [
        entry
        for leaves in settings.leaves
        for learning_rate in settings.learning_rates
        for entry in _price_blocks(blocks(leaves, learning_rate), leaves, learning_rate, pricing, settings)
    ]
    chosen = min(priced, key=lambda entry: entry.row["total_bytes"])  # the first of equals: grid order
    params = {
        "leaves": chosen.row["leaves"],
        "learning_rate": chosen.row["learning_rate"],
        "weighting": settings.weighting,
        "train_nonmembers": min(train_rows, settings.train_nonmembers),
        "max_bin": settings.max_bin,
        "min_leaf_rows": settings.min_leaf_rows,
        "feature_fraction": settings.feature_fraction,
        "seed": settings.seed,
    }
    return ModelChoice(
        forest=chosen.forest,
        trees=chosen.forest.trees,
        params=params,
        auc=weighted_auc(chosen.member_scores, chosen.val_scores, pricing.w_val_non),
        model_bytes=chosen.row["model_bytes"],
        filter_bytes=chosen.row["filter_bytes"],
        total_bytes=chosen.row["total_bytes"],
        candidates=[entry.row for entry in priced],
        train_seconds=time.perf_counter() - pricing.clock_start,
    )


def _pricing(X_members, X_train_non, w_train_non, X_val_non, w_val_non, filter_bytes: FilterBytes) -> _Pricing:
    _check_inputs(X_members, X_train_non, w_train_non, X_val_non, w_val_non)
    return _Pricing(X_members, X_val_non, np.asarray(w_val_non, dtype=np.float64), filter_bytes, time.perf_counter())


def fit_model(
    X_members: np.ndarray,
    X_train_non: np.ndarray,
    w_train_non: np.ndarray,
    X_val_non: np.ndarray,
    w_val_non: np.ndarray,
    filter_bytes: FilterBytes,
    settings: ModelSettings = ModelSettings(),
) -> ModelChoice:
    """Train every candidate capacity, price each checkpoint in artifact bytes, keep the cheapest.

    `filter_bytes(member_scores, val_scores, val_weights)` prices the backup filters for the
    compiled integer scores of all members and of the validation non-members (with their lookup
    counts as weights). The first row priced is the forest of no trees (a plain Bloom filter
    behind it); a model is chosen only when it pays for its own bytes. The reported AUC is of
    members against validation non-members weighted by their lookup counts (the same weighting
    as the false-positive rate); it is 0.5 for the forest of no trees.
    """
    pricing = _pricing(X_members, X_train_non, w_train_non, X_val_non, w_val_non, filter_bytes)
    dataset = _training_set(X_members, X_train_non, w_train_non, settings)

    def blocks(leaves: int, learning_rate: float) -> TreeBlocks:
        booster = lgb.Booster(_booster_params(leaves, learning_rate, settings), dataset)
        return _grown_blocks(booster, _tree_cap(leaves, settings), settings.checkpoint_every)

    return _choose(pricing, blocks, len(X_train_non), settings)


# Training on a Dask cluster -------------------------------------------------------------------


@dataclass(frozen=True)
class ClusterRows:
    """Training rows dealt out to the workers of a Dask cluster, one part per worker.

    The rows, ordered by label, are dealt like cards: of n workers (in sorted address order),
    worker i holds rows i, i + n, i + 2n, ... of that order. So every part has its share of each
    label: distributed LightGBM finds the histogram bins of each feature from the rows of one
    worker, which must look like all of them, and each worker's classifier must see both labels
    (n is at most the count of the rarer label). `parts` keeps the scattered data alive on the
    workers for as long as this object lives.
    """

    client: object  # distributed.Client
    rows: object  # dask arrays, one chunk per worker
    labels: object
    weights: object
    parts: tuple


def scatter_rows(client, rows: np.ndarray, labels: np.ndarray, weights: np.ndarray) -> ClusterRows:
    """Send training rows, labels and weights to the workers of `client` (a distributed.Client)."""
    import dask.array as da  # only the cluster path needs dask

    workers = sorted(client.nthreads())
    if not workers:
        raise ValueError(f"the Dask cluster at {client.scheduler.address} has no workers; start some or wait for them")
    workers = workers[: int(np.unique(labels, return_counts=True)[1].min())]
    order = np.argsort(labels, kind="stable")
    dealt = [np.sort(order[index :: len(workers)]) for index in range(len(workers))]
    parts, arrays = [], []
    for array in (rows, labels, weights):
        chunks = []
        for pick, worker in zip(dealt, workers):
            part = array[pick]
            future = client.scatter(part, workers=[worker], hash=False)
            parts.append(future)
            chunks.append(da.from_delayed(future, shape=part.shape, dtype=part.dtype))
        arrays.append(da.concatenate(chunks))
    return ClusterRows(client, *arrays, parts=tuple(parts))


class _RankedClient:
    """A distributed.Client whose `who_has` lists workers in sorted address order.

    LightGBM's Dask interface (4.x) numbers its machines in the order `who_has` lists the workers
    holding the data, which follows a set of random task keys. The numbering changes what
    distributed LightGBM computes where (as we recall its source: which machine bins which
    features from its own rows), and the trees changed from one training to the next (in 3 runs
    of 3 of the determinism test in tests/test_cluster.py). With the workers sorted, worker i is machine i and holds part i (see
    ClusterRows): the same rows on the same number of workers give the same trees.
    """

    def __init__(self, client):
        self._client = client

    def __getattr__(self, name: str):
        return getattr(self._client, name)

    def who_has(self, futures=None, **kwargs) -> dict:
        holders = self._client.who_has(futures, **kwargs)
        return dict(sorted(holders.items(), key=lambda item: (sorted(item[1]), str(item[0]))))


def train_on_cluster(data: ClusterRows, params: dict, trees: int) -> lgb.Booster:
    """A binary booster of (at most) `trees` trees, trained on the cluster by LightGBM's Dask
    interface with these LightGBM parameters.

    Every worker trains with as many threads as it has (LightGBM's Dask interface sets
    num_threads itself) and listens on a free port it finds and holds until training starts, so
    parallel builds on one machine do not collide.
    """
    from lightgbm.dask import DaskLGBMClassifier  # only the cluster path needs dask

    params = {name: value for name, value in params.items() if name != "num_threads"}
    model = DaskLGBMClassifier(client=_RankedClient(data.client), n_estimators=trees, **params)
    with warnings.catch_warnings():
        # it warns that the sklearn interface's n_jobs, which it replaces by the workers' threads, is ignored
        warnings.filterwarnings("ignore", message="Parameter n_jobs will be ignored", category=UserWarning)
        model.fit(data.rows, data.labels, sample_weight=data.weights)
    return model.booster_


def fit_model_on_cluster(
    client,
    X_members: np.ndarray,
    X_train_non: np.ndarray,
    w_train_non: np.ndarray,
    X_val_non: np.ndarray,
    w_val_non: np.ndarray,
    filter_bytes: FilterBytes,
    settings: ModelSettings = ModelSettings(),
) -> ModelChoice:
    """`fit_model`, with every candidate trained on the Dask cluster of `client` (a
    distributed.Client) through LightGBM's Dask interface.

    The training rows, labels and weights are those of `fit_model`, scattered once to the workers
    for all candidates. Each candidate trains up to its tree cap in one go; its prefixes are then
    compiled and priced every `checkpoint_every` trees on this machine, with the same pricing and
    the same patience rule as `fit_model`. Distributed LightGBM finds its histogram bins and sums
    its histograms across workers, so its trees are not those of a local run; they are the same
    from one run to the next on the same number of workers (see `_RankedClient`).

    Inside a task that runs on a Dask worker, pass `distributed.worker_client()`: it frees the
    worker's thread, which LightGBM needs there. A plain Client opened in the task (as
    prefect_dask.get_dask_client does) holds that thread, and training waits for it forever on a
    worker of one thread.
    """
    pricing = _pricing(X_members, X_train_non, w_train_non, X_val_non, w_val_non, filter_bytes)
    data = scatter_rows(client, *_training_rows(X_members, X_train_non, w_train_non, settings))
    try:
        def blocks(leaves: int, learning_rate: float) -> TreeBlocks:
            booster = train_on_cluster(data, _booster_params(leaves, learning_rate, settings), _tree_cap(leaves, settings))
            return _trained_blocks(booster, settings.checkpoint_every)

        return _choose(pricing, blocks, len(X_train_non), settings)
    finally:
        client.cancel(list(data.parts))


def _check_inputs(X_members, X_train_non, w_train_non, X_val_non, w_val_non) -> None:
    matrices = {"X_members": X_members, "X_train_non": X_train_non, "X_val_non": X_val_non}
    for name, X in matrices.items():
        if not isinstance(X, np.ndarray) or X.dtype != np.float32 or X.ndim != 2:
            got = f"{X.dtype} array of shape {X.shape}" if isinstance(X, np.ndarray) else type(X).__name__
            raise ValueError(f"{name} must be a float32 matrix (rows x features), got {got}")
        if len(X) == 0:
            raise ValueError(f"{name} is empty; the model needs members, training and validation non-members")
    widths = {name: X.shape[1] for name, X in matrices.items()}
    if len(set(widths.values())) != 1:
        raise ValueError(f"feature matrices disagree on the number of columns: {widths}")
    for name, weights, X in (("w_train_non", w_train_non, X_train_non), ("w_val_non", w_val_non, X_val_non)):
        weights = np.asarray(weights, dtype=np.float64)
        if weights.shape != (len(X),) or not np.isfinite(weights).all() or (weights < 0).any() or weights.sum() <= 0:
            raise ValueError(f"{name} must hold one finite non-negative weight per row of its matrix, with a positive sum")
