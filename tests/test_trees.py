"""Tests of the compiled forest: its evaluators against LightGBM itself, its stored form, its checks.

External reference: the LightGBM Python package (4.x) — `Booster.predict(pred_leaf=True)` gives the
leaf of every tree and `predict(raw_score=True)` the raw score; scipy.stats.spearmanr for ranking.
The batch evaluator relies on the exit-leaf property of QuickScorer (Lucchese et al., "QuickScorer:
a fast algorithm to rank documents with additive ensembles of regression trees", SIGIR 2015).
"""

from __future__ import annotations

import time

import lightgbm as lgb
import msgpack
import numpy as np
import pytest
from scipy import stats

from tamis import trees as trees_module
from tamis.booster import compile_booster
from tamis.trees import Forest, leaf_indices, score_batch, score_row

LGB_PARAMS = {"objective": "binary", "verbose": -1, "num_threads": 2, "seed": 3, "deterministic": True,
              "force_col_wise": True, "min_data_in_leaf": 5}


def counts_like(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    """Features shaped like key statistics: small integer counts plus ratios of two of them."""
    X = rng.poisson(rng.uniform(0.5, 8.0, d), size=(n, d)).astype(np.float32)
    for j in range(0, d - 1, 3):  # every third column: count / (another count + 1), rounded once
        X[:, j] = (X[:, j + 1] / (X[:, j] + 1.0)).astype(np.float32)
    return X


def train(X: np.ndarray, y: np.ndarray, trees: int, **params) -> lgb.Booster:
    return lgb.train({**LGB_PARAMS, **params}, lgb.Dataset(X, y), num_boost_round=trees)


def labels_for(X: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    signal = X[:, 0] * 2.0 + X[:, 1] - X[:, 2] + 0.5 * X[:, 4] * X[:, 5]
    return (signal + rng.normal(0.0, 2.0, len(X)) > np.median(signal)).astype(np.float64)


@pytest.fixture(scope="module")
def fitted():
    """A 30-tree, 15-leaf booster on counts-like data, its compiled forest, and fresh rows."""
    rng = np.random.default_rng(11)
    X = counts_like(rng, 6000, 9)
    booster = train(X, labels_for(X, rng), 30, num_leaves=15)
    return booster, compile_booster(booster), counts_like(rng, 4000, 9)


def boundary_rows(forest: Forest, base: np.ndarray) -> np.ndarray:
    """Rows that put each split's feature at its float32 threshold and at the float32s either side."""
    rows = []
    for feature, threshold in zip(forest.feature.tolist(), forest.threshold.tolist()):
        t32 = np.float32(threshold)
        for value in (np.nextafter(t32, np.float32(-np.inf)), t32, np.nextafter(t32, np.float32(np.inf))):
            row = base[len(rows) % len(base)].copy()
            row[feature] = value
            rows.append(row)
    return np.array(rows, dtype=np.float32)


def assert_matches_lightgbm(booster: lgb.Booster, forest: Forest, X: np.ndarray) -> None:
    # (a) every tree's leaf equals LightGBM's own leaf index, exactly
    np.testing.assert_array_equal(leaf_indices(forest, X), booster.predict(X, pred_leaf=True))
    # (b) score / scale is LightGBM's raw score within the rounding bound of trees * 0.5 / scale
    scores = score_batch(forest, X)
    raw = booster.predict(X, raw_score=True)
    bound = forest.trees * 0.5 / forest.scale
    assert np.abs(scores / forest.scale - raw).max() <= bound + 1e-12
    # (c) the ranking agrees: exact order wherever the raw scores differ by more than 2 bounds
    order = np.argsort(raw, kind="stable")
    raw_sorted, int_sorted = raw[order], scores[order]
    clear_below = np.searchsorted(raw_sorted, raw_sorted - 2 * bound, side="left")  # rows certainly below
    prefix_max = np.maximum.accumulate(int_sorted)
    has_below = clear_below > 0
    assert (prefix_max[clear_below[has_below] - 1] < int_sorted[has_below]).all()
    if np.ptp(raw) > 0:
        assert stats.spearmanr(scores, raw).statistic > 0.9999


def test_compiled_forest_reproduces_lightgbm_on_counts_like_data(fitted):
    booster, forest, X = fitted
    assert forest.trees == 30 and forest.max_splits == 14
    assert_matches_lightgbm(booster, forest, X)


def test_compiled_forest_reproduces_lightgbm_at_every_threshold(fitted):
    booster, forest, X = fitted
    edges = boundary_rows(forest, X)
    assert_matches_lightgbm(booster, forest, edges)


@pytest.mark.parametrize("leaves, trees, seed", [(2, 5, 0), (7, 12, 1), (31, 8, 2), (64, 4, 3)])
def test_compiled_forest_reproduces_lightgbm_on_random_data(leaves, trees, seed):
    rng = np.random.default_rng(seed)
    X = rng.normal(0.0, 1.0, (5000, 6)).astype(np.float32) * rng.choice([1e-3, 1.0, 1e4], 6).astype(np.float32)
    y = (rng.random(5000) < 1 / (1 + np.exp(-X[:, 0] / X[:, 0].std() - X[:, 3] / X[:, 3].std()))).astype(float)
    booster = train(X, y, trees, num_leaves=leaves, learning_rate=0.5)
    forest = compile_booster(booster)
    assert forest.max_splits <= leaves - 1
    assert_matches_lightgbm(booster, forest, np.vstack([rng.normal(0.0, 2.0, (3000, 6)).astype(np.float32) * X.std(axis=0), X]))
    assert_matches_lightgbm(booster, forest, boundary_rows(forest, X))


def test_score_row_equals_score_batch(fitted):
    _, forest, X = fitted
    rows = np.vstack([X[:300], boundary_rows(forest, X)])
    batch = score_batch(forest, rows)
    assert [score_row(forest, row) for row in rows] == batch.tolist()


def test_nan_goes_left_in_both_evaluators(fitted):
    """A NaN compares false with every threshold, so both evaluators send it to the left child."""
    _, forest, X = fitted
    rows = X[:50].copy()
    rows[:, ::2] = np.nan
    batch = score_batch(forest, rows)
    assert [score_row(forest, row) for row in rows] == batch.tolist()
    neg_inf = X[:50].copy()
    neg_inf[:, ::2] = -np.inf  # -inf is below every finite threshold: it goes left too
    np.testing.assert_array_equal(batch, score_batch(forest, neg_inf))


def test_chunked_evaluation_gives_the_same_scores(fitted, monkeypatch):
    _, forest, X = fitted
    whole = score_batch(forest, X)
    for rows in (1, 7, 4096):
        monkeypatch.setattr(trees_module, "CHUNK_ROWS", rows)
        np.testing.assert_array_equal(score_batch(Forest.from_parts(forest.meta(), forest.sections()), X), whole)


def test_edge_sizes_zero_rows_zero_trees_and_single_leaf_trees():
    empty = Forest(
        features=3, scale=1, bias=-7,
        tree_splits=np.zeros(0, np.uint8), feature=np.zeros(0, np.uint8), threshold=np.zeros(0, np.float32),
        left=np.zeros(0, np.int8), right=np.zeros(0, np.int8), value=np.zeros(0, np.int16),
    )
    X = np.ones((4, 3), np.float32)
    np.testing.assert_array_equal(score_batch(empty, X), [-7] * 4)
    assert score_row(empty, X[0]) == -7
    assert leaf_indices(empty, X).shape == (4, 0)
    stumps = Forest(
        features=3, scale=1, bias=0,
        tree_splits=np.zeros(2, np.uint8), feature=np.zeros(0, np.uint8), threshold=np.zeros(0, np.float32),
        left=np.zeros(0, np.int8), right=np.zeros(0, np.int8), value=np.array([5, -2], np.int16),
    )
    np.testing.assert_array_equal(score_batch(stumps, X), [3] * 4)
    assert score_row(stumps, X[0]) == 3
    assert score_batch(stumps, np.zeros((0, 3), np.float32)).shape == (0,)


def test_a_lightgbm_stump_compiles():
    """A booster whose data cannot be split yields single-leaf trees; they compile and score."""
    X = np.ones((100, 2), np.float32)
    y = np.r_[np.ones(30), np.zeros(70)]
    booster = train(X, y, 3)
    forest = compile_booster(booster)
    assert forest.max_splits == 0
    assert abs(score_batch(forest, X)[0] / forest.scale - booster.predict(X[:1], raw_score=True)[0]) <= 1.5 / forest.scale


def test_sections_are_narrow_little_endian_and_meta_is_msgpack_plain(fitted):
    _, forest, _ = fitted
    sections = forest.sections()
    assert {k: v.dtype.str for k, v in sections.items()} == {
        "forest.tree_splits": "|u1", "forest.feature": "|u1", "forest.threshold": "<f4",
        "forest.left": "|i1", "forest.right": "|i1", "forest.value": "<i2",
    }
    assert forest.nbytes == sum(a.nbytes for a in sections.values())
    assert msgpack.unpackb(msgpack.packb(forest.meta())) == forest.meta()


def test_from_parts_round_trips_through_bytes(fitted):
    _, forest, X = fitted
    wire = {name: np.frombuffer(a.tobytes(), dtype=a.dtype) for name, a in forest.sections().items()}
    meta = msgpack.unpackb(msgpack.packb(forest.meta()))
    again = Forest.from_parts(meta, {**wire, "filter.words": np.zeros(3, np.uint64)})  # other stages' sections are ignored
    np.testing.assert_array_equal(score_batch(again, X), score_batch(forest, X))
    for name, array in again.sections().items():
        np.testing.assert_array_equal(array, forest.sections()[name])


def test_forest_arrays_are_private_and_read_only(fitted):
    _, forest, X = fitted
    sections = {name: a.copy() for name, a in forest.sections().items()}
    again = Forest.from_parts(forest.meta(), sections)
    sections["forest.feature"][:] = 200  # the caller's arrays change; the forest's do not
    assert not again.feature.flags.writeable
    np.testing.assert_array_equal(score_batch(again, X), score_batch(forest, X))


# A tiny hand-made forest (tree 0: root splits on x0 at 0.5, its right child on x1 at 2.0; tree 1:
# one split on x1 at 1.0), for corruptions one field at a time.
def tiny_parts() -> tuple[dict, dict]:
    sections = {
        "forest.tree_splits": np.array([2, 1], np.uint8),
        "forest.feature": np.array([0, 1, 1], np.uint8),
        "forest.threshold": np.array([0.5, 2.0, 1.0], np.float32),
        "forest.left": np.array([-1, -2, -1], np.int8),
        "forest.right": np.array([1, -3, -2], np.int8),
        "forest.value": np.array([10, 20, 30, -1, 1], np.int16),
    }
    return {"features": 2, "trees": 2, "scale": 16, "bias": 100}, sections


def test_tiny_forest_scores_by_hand():
    forest = Forest.from_parts(*tiny_parts())
    X = np.array([[0.0, 0.0], [1.0, 1.5], [1.0, 3.0], [0.5, 1.0]], np.float32)
    # row 0: x0 <= 0.5 -> leaf 0 (10); x1 <= 1 -> -1 | row 1: x0 > 0.5, x1 <= 2 -> 20; x1 > 1 -> 1
    # row 2: -> 30, 1 | row 3: x0 = 0.5 is not above 0.5 -> 10; x1 = 1 -> -1
    expected = [100 + 10 - 1, 100 + 20 + 1, 100 + 30 + 1, 100 + 10 - 1]
    assert score_batch(forest, X).tolist() == expected
    assert [score_row(forest, x) for x in X] == expected
    np.testing.assert_array_equal(leaf_indices(forest, X), [[0, 0], [1, 1], [2, 1], [0, 0]])


def corrupt(name: str, array: np.ndarray, meta_change: dict | None = None) -> tuple[dict, dict]:
    meta, sections = tiny_parts()
    return {**meta, **(meta_change or {})}, {**sections, name: array}


@pytest.mark.parametrize(
    "meta, sections, message",
    [
        (*corrupt("forest.right", np.array([1, -3, -4], np.int8)), "out of range"),  # leaf 3 of a 2-leaf tree
        (*corrupt("forest.right", np.array([2, -3, -2], np.int8)), "out of range"),  # node 2 of a 2-node tree
        (*corrupt("forest.right", np.array([0, -3, -2], np.int8)), "after their parent"),  # the root as child: a cycle
        (*corrupt("forest.left", np.array([1, -2, -1], np.int8)), "child of 2 nodes"),  # node 1 twice
        (*corrupt("forest.left", np.array([-2, -2, -1], np.int8)), "leaf 0 .* child of 0 nodes"),  # leaf 1 twice, leaf 0 never
        (*corrupt("forest.feature", np.array([0, 2, 1], np.uint8)), "feature 2, but there are only 2"),
        (*corrupt("forest.feature", np.array([0, 1, 1], np.int64)), "dtype <i8"),
        (*corrupt("forest.threshold", np.array([0.5, 2.0, 1.0], np.float64)), "dtype <f8"),
        (*corrupt("forest.threshold", np.array([0.5, 2.0, 1.0], ">f4")), "dtype >f4"),
        (*corrupt("forest.threshold", np.array([0.5, np.nan, 1.0], np.float32)), "non-finite threshold"),
        (*corrupt("forest.right", np.array([1, -3, -2], np.int16)), "dtype <i2"),  # left and right differ
        (*corrupt("forest.value", np.array([10, 20, 30, -1], np.int16)), "value has 4 entries"),
        (*corrupt("forest.feature", np.array([0, 1], np.uint8)), "feature has 2 entries"),
        (*corrupt("forest.value", np.array([[10, 20, 30, -1, 1]], np.int16)), "must be 1-D"),
        (*corrupt("forest.value", [10, 20, 30, -1, 1]), "must be a numpy array"),
        (*corrupt("forest.value", np.array([2**31 - 1, 0, 0, 0, 0], np.int32)), "beyond the int32 range"),
        (*corrupt("forest.tree_splits", np.array([2, 1], np.uint8), {"trees": 3}), "meta says 3 trees"),
        (*corrupt("forest.tree_splits", np.array([2, 1], np.uint8), {"features": 0}), "features must be from 1 to 255"),
        (*corrupt("forest.tree_splits", np.array([2, 1], np.uint8), {"scale": 1.5}), "scale must be a Python int"),
        (*corrupt("forest.tree_splits", np.array([2, 1], np.uint8), {"bias": True}), "bias must be a Python int"),
    ],
)
def test_from_parts_rejects_corrupted_parts(meta, sections, message):
    with pytest.raises(ValueError, match=message):
        Forest.from_parts(meta, sections)


def test_from_parts_rejects_missing_or_extra_names():
    meta, sections = tiny_parts()
    del sections["forest.value"]
    with pytest.raises(ValueError, match=r"missing \['forest.value'\]"):
        Forest.from_parts(meta, sections)
    meta, sections = tiny_parts()
    with pytest.raises(ValueError, match=r"unexpected \['forest.extra'\]"):
        Forest.from_parts(meta, {**sections, "forest.extra": np.zeros(1, np.uint8)})
    with pytest.raises(ValueError, match="exactly the keys"):
        Forest.from_parts({**meta, "depth": 3}, sections)
    with pytest.raises(ValueError, match="exactly the keys"):
        Forest.from_parts([1, 2], sections)


def test_from_parts_rejects_a_tree_beyond_64_leaves():
    splits = 64  # a chain: node i goes left to leaf i and right to node i + 1
    left = -1 - np.arange(splits)
    right = np.r_[np.arange(1, splits), -1 - splits]
    sections = {
        "forest.tree_splits": np.array([splits], np.uint8),
        "forest.feature": np.zeros(splits, np.uint8),
        "forest.threshold": np.arange(splits, dtype=np.float32),
        "forest.left": left.astype(np.int8),
        "forest.right": right.astype(np.int8),
        "forest.value": np.zeros(splits + 1, np.int16),
    }
    meta = {"features": 1, "trees": 1, "scale": 1, "bias": 0}
    with pytest.raises(ValueError, match="65 leaves; at most 64"):
        Forest.from_parts(meta, sections)
    sections = {k: (v[:-1] if k in ("forest.feature", "forest.threshold") else v) for k, v in sections.items()}
    sections.update({"forest.tree_splits": np.array([63], np.uint8), "forest.left": left[:-1].astype(np.int8),
                     "forest.right": np.r_[np.arange(1, 63), -64].astype(np.int8), "forest.value": np.arange(64, dtype=np.int16)})
    deep = Forest.from_parts(meta, sections)  # 64 leaves, depth 63: the widest tree there is
    x = np.arange(64, dtype=np.float32)[:, None] - 0.5
    np.testing.assert_array_equal(score_batch(deep, x), np.r_[np.arange(64)])
    assert [score_row(deep, row) for row in x] == list(range(64))


def test_random_corruptions_are_refused_or_evaluate_safely(fitted):
    """Hostile bytes: flip entries of one section at random. Either from_parts refuses with a
    ValueError, or the forest it returns scores every row in range, the same on both paths."""
    _, forest, X = fitted
    rng = np.random.default_rng(5)
    accepted = 0
    for trial in range(400):
        sections = {name: a.copy() for name, a in forest.sections().items()}
        name = list(sections)[trial % len(sections)]
        target = sections[name]
        spots = rng.integers(0, len(target), rng.integers(1, 4))
        raw = target.view(np.uint8).reshape(len(target), -1)
        raw[spots, rng.integers(0, raw.shape[1], len(spots))] = rng.integers(0, 256, len(spots), dtype=np.uint8)
        try:
            hostile = Forest.from_parts(forest.meta(), sections)
        except ValueError:
            continue
        accepted += 1
        scores = score_batch(hostile, X[:64])
        assert [score_row(hostile, x) for x in X[:64]] == scores.tolist()
        assert (np.abs(scores) <= trees_module.INT32_LIMIT).all()
    assert 0 < accepted < 400  # some corruptions are harmless (thresholds, values), many are refused


def test_score_batch_refuses_the_wrong_matrix(fitted):
    _, forest, X = fitted
    with pytest.raises(ValueError, match="float32 feature matrix of shape"):
        score_batch(forest, X.astype(np.float64))
    with pytest.raises(ValueError, match=r"shape \(n, 9\)"):
        score_batch(forest, X[:, :5])
    with pytest.raises(ValueError, match="float32 row of 9 features"):
        score_row(forest, X[0, :5])


@pytest.mark.slow
def test_batch_speed_on_a_million_rows(fitted):
    """Rows per second of score_batch for 30 trees of 15 leaves (prints the figure; the floor only
    catches an order-of-magnitude regression such as a per-row Python loop)."""
    _, forest, _ = fitted
    X = counts_like(np.random.default_rng(2), 1_000_000, 9)
    score_batch(forest, X[:1000])
    start = time.process_time()
    score_batch(forest, X)
    rate = len(X) / (time.process_time() - start)
    print(f"score_batch: {rate:,.0f} rows/s (CPU time, 30 trees x 15 leaves)")
    assert rate > 200_000


def test_feature_major_and_list_evaluators_agree(fitted):
    _, forest, X = fitted
    rows = np.vstack([X[:500], boundary_rows(forest, X)])
    expected = score_batch(forest, rows)
    np.testing.assert_array_equal(trees_module.score_columns(forest, np.ascontiguousarray(rows.T)), expected)
    np.testing.assert_array_equal(trees_module.score_columns(forest, rows.T), expected)  # a strided view
    assert [trees_module.score_values(forest, row.tolist()) for row in rows] == expected.tolist()
    with pytest.raises(ValueError, match=r"shape \(9, n\)"):
        trees_module.score_columns(forest, rows)


@pytest.mark.parametrize("every", [1, 2, 100])
def test_dropping_finished_walks_does_not_change_leaves(fitted, monkeypatch, every):
    booster, forest, X = fitted
    monkeypatch.setattr(trees_module, "COMPACT_LEVELS", every)
    again = Forest.from_parts(forest.meta(), forest.sections())
    np.testing.assert_array_equal(leaf_indices(again, X), booster.predict(X, pred_leaf=True))
