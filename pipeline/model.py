"""The model stage: train a gradient-boosted classifier and pick its capacity by artifact bytes.

The classifier (LightGBM, binary log-loss) learns members (label 1, every one of them) against a
sample of training non-members (label 0, weighted by their lookup counts). Its capacity is chosen by
the quantity the user pays for: the artifact bytes it leads to, that is the compiled forest's bytes
plus the backup filters it needs at the target false-positive rate. The caller's `filter_bytes`
prices the filters from the compiled integer scores of all members and of validation non-members
the model never trained on. Every candidate (leaves x learning rate) grows tree by tree; at every
checkpoint its prefix is compiled and priced, and the cheapest prefix of all candidates wins.
On a Dask cluster (`fit_model_on_cluster`), LightGBM's Dask interface trains each candidate up to
its tree cap and the same pricing walks its prefixes; dask is imported only there. Compiling the
trees into the integer forest is `tamis.booster`; the settings are `tamis.config.ModelSettings`.
"""

from __future__ import annotations

import math
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field

import lightgbm as lgb
import numpy as np

from tamis.booster import RawTree, booster_trees, compile_trees
from tamis.config import WEIGHTINGS, ModelSettings
from tamis.corpus import training_sample
from tamis.trees import Forest, leaf_indices

# Bytes the forest adds to an artifact beyond its sections: its meta in the msgpack header (about
# 50 bytes) and, for each of its 6 sections, a header entry (name, dtype, offset, length, checksum:
# about 50 bytes) plus 32 bytes of 64-byte alignment padding on average. The same for every
# candidate, so it moves the totals, never the choice.
FOREST_OVERHEAD_BYTES = 50 + 6 * (50 + 32)


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
