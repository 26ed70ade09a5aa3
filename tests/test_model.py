"""Tests of the model stage: float32 threshold snapping, quantisation, AUC, and the choice by bytes.

External references: the LightGBM Python package (4.x) itself for what a compiled booster must
reproduce; scipy.stats.mannwhitneyu for the rank formula of the AUC (U / (n1 n2)); the Bloom
filter size m = -n ln f / (ln 2)^2 (Bloom, CACM 1970, standard analysis, via tamis.bloom) inside
the filter price used here; IEEE 754 binary32 for the float32 neighbours (numpy.nextafter).
"""

from __future__ import annotations

import dataclasses
import math

import lightgbm as lgb
import numpy as np
import pytest
from scipy import stats
from test_trees import assert_matches_lightgbm

from tamis.sizing import bloom_bits
from tamis.booster import MAX_ROUNDING_ERROR, choose_scale, compile_booster, compile_trees, float32_at_or_below, parse_tree
from tamis.config import ModelSettings
from tamis.format import INT32_LIMIT
from tamis.model import fit_model, weighted_auc
from tamis.trees import score_batch

TARGET_FPR = 0.01


def key_like(rng: np.random.Generator, n: int, bot_share: float) -> np.ndarray:
    """Counts-like features of handles: bots are long and digit-heavy, players short and wordy;
    a share of each class looks like the other, so the classifier is good but not perfect."""
    bot = rng.random(n) < bot_share
    length = rng.poisson(np.where(bot, 12.0, 7.0)) + 3
    digits = rng.binomial(length, np.where(bot, 0.45, 0.08))
    letters = length - digits
    vowels = rng.binomial(letters, np.where(bot, 0.2, 0.4))
    upper = rng.binomial(letters, 0.15)
    runs = 1 + rng.binomial(length - 1, np.where(bot, 0.35, 0.12))
    noise = rng.poisson(3.0, size=(n, 4))
    columns = [length, digits, letters, vowels, upper, runs, digits / length, vowels / np.maximum(letters, 1)]
    return np.column_stack([np.asarray(c, dtype=np.float64) for c in columns] + [noise]).astype(np.float32)


def lookup_counts(rng: np.random.Generator, n: int) -> np.ndarray:
    """Zipf-like lookup counts P(k) ~ k^-2, capped at 10,000."""
    return np.minimum(rng.zipf(2.0, n), 10_000).astype(np.float64)


@pytest.fixture(scope="module")
def corpus():
    rng = np.random.default_rng(20261201)
    return {
        "X_members": key_like(rng, 3000, 0.92),
        "X_train_non": key_like(rng, 6000, 0.03),
        "w_train_non": lookup_counts(rng, 6000),
        "X_val_non": key_like(rng, 6000, 0.03),
        "w_val_non": lookup_counts(rng, 6000),
    }


def threshold_bloom_bytes(member_scores, val_scores, val_weights, target: float = TARGET_FPR) -> float:
    """Bytes of the cheapest one-threshold filter at the target false-positive rate.

    Keys scoring at or above a threshold answer yes (their share H of validation lookups are all
    false positives); members below it go into a Bloom filter at rate (target - H) / (1 - H), so
    that the whole rate is the target. Thresholds tried: 64 quantiles of the member scores.
    """
    weights = np.asarray(val_weights, dtype=np.float64) / np.sum(val_weights)
    best = bloom_bits(len(member_scores), target) / 8  # no threshold: a plain Bloom filter
    for threshold in np.unique(np.quantile(member_scores, np.linspace(0, 1, 64), method="lower")):
        above = weights[val_scores >= threshold].sum()
        if above >= target:
            continue
        below_members = int((member_scores < threshold).sum())
        rate = (target - above) / (1.0 - above)
        best = min(best, bloom_bits(below_members, rate) / 8)
    return best


# Thresholds ---------------------------------------------------------------------------------


def test_float32_at_or_below_is_the_largest_float32_not_above():
    rng = np.random.default_rng(1)
    doubles = np.concatenate([
        rng.normal(0, 1, 2000), rng.normal(0, 1e6, 500), rng.uniform(-1e-30, 1e-30, 200),
        np.arange(-50, 50) + 0.5, [0.0, -0.0, 1e-35, 1.0000000180025095e-35, 2.8333333730697636, 3.4e38, -3.4e38],
    ])
    for t in doubles.tolist():
        t32 = float32_at_or_below(t)
        assert isinstance(t32, np.float32)
        assert float(t32) <= t < float(np.nextafter(t32, np.float32(np.inf)))


def test_float32_at_or_below_keeps_exact_values_and_clamps_the_range():
    assert float32_at_or_below(0.5) == np.float32(0.5)
    assert float32_at_or_below(float(np.float32(2.8333333))) == np.float32(2.8333333)
    assert float32_at_or_below(1e300) == np.finfo(np.float32).max  # LightGBM writes 1e300 for +inf
    assert float32_at_or_below(-1e300) == -np.inf
    assert float32_at_or_below(math.inf) == np.inf


def test_snapped_threshold_decides_every_float32_neighbour_like_the_double():
    """For float32 x near t: (x <= t32) must equal (x <= t) computed in double, as LightGBM does."""
    rng = np.random.default_rng(2)
    for t in rng.normal(0, 10, 300).tolist():
        t32 = float32_at_or_below(t)
        x = np.float32(t)
        for _ in range(3):
            x = np.nextafter(x, np.float32(-np.inf))
        for _ in range(7):
            assert (x <= t32) == (float(x) <= t)
            x = np.nextafter(x, np.float32(np.inf))


# Quantisation -------------------------------------------------------------------------------


def test_small_forests_store_int16_leaves_within_the_rounding_goal():
    rng = np.random.default_rng(3)
    leaves = [rng.normal(-2.0 if i == 0 else 0.0, 0.3, 15) for i in range(20)]
    scale, dtype = choose_scale(leaves)
    assert dtype == np.int16 and scale & (scale - 1) == 0
    assert len(leaves) * 0.5 / scale <= MAX_ROUNDING_ERROR


def test_large_forests_fall_back_to_int32_at_the_largest_safe_scale():
    rng = np.random.default_rng(4)
    raw = [_stump(v) for v in rng.normal(0.0, 40.0, 300)]
    forest = compile_trees(raw, 1)
    assert forest.value.dtype == np.int32
    # |bias| + the largest |leaf| of every tree fits int32, and it would not at twice the scale
    # (doubling the scale doubles that bound, give or take one unit of rounding per tree)
    bound = abs(forest.bias) + int(np.abs(forest.value.astype(np.int64)).reshape(-1, 2).max(axis=1).sum())
    assert INT32_LIMIT // 2 - forest.trees < bound <= INT32_LIMIT


def test_compiled_scores_never_overflow_an_int32_accumulator():
    """Adversarial leaves: each tree's extreme leaf. The partial sums must stay inside int32."""
    rng = np.random.default_rng(5)
    raw = [_stump(v) for v in rng.choice([-1, 1], 200) * rng.uniform(5e3, 1e4, 200)]
    forest = compile_trees(raw, 1)
    values = forest.value.astype(np.int64).reshape(-1, 2)
    for pick in (values.max(axis=1), values.min(axis=1)):
        partial = forest.bias + np.cumsum(pick)
        assert np.abs(partial).max() <= INT32_LIMIT and abs(forest.bias) <= INT32_LIMIT


def test_absurd_leaf_values_are_refused():
    with pytest.raises(ValueError, match="too large to quantise"):
        compile_trees([_stump(1e10), _stump(-1e10)], 1)


def _stump(value: float):
    """A one-split tree on feature 0 at 0.5: leaf 0 gets -value, leaf 1 +value (dump_model form)."""
    return parse_tree({
        "tree_index": 0, "num_leaves": 2,
        "tree_structure": {
            "split_feature": 0, "threshold": 0.5, "decision_type": "<=", "missing_type": "None",
            "left_child": {"leaf_index": 0, "leaf_value": -value},
            "right_child": {"leaf_index": 1, "leaf_value": value},
        },
    })


def test_categorical_and_zero_missing_splits_are_refused():
    tree = {"tree_index": 0, "num_leaves": 2, "tree_structure": {
        "split_feature": 0, "threshold": "1||2", "decision_type": "==", "missing_type": "None",
        "left_child": {"leaf_index": 0, "leaf_value": 0.1}, "right_child": {"leaf_index": 1, "leaf_value": 0.2}}}
    with pytest.raises(ValueError, match="categorical"):
        parse_tree(tree)
    tree["tree_structure"].update(decision_type="<=", threshold=0.5, missing_type="Zero")
    with pytest.raises(ValueError, match="missing type 'Zero'"):
        parse_tree(tree)


def test_quantisation_costs_no_filter_bytes(corpus):
    """The int scores of the compiled forest price the filters like the unrounded raw scores do."""
    X = np.vstack([corpus["X_members"], corpus["X_train_non"]])
    y = np.r_[np.ones(len(corpus["X_members"])), np.zeros(len(corpus["X_train_non"]))]
    booster = lgb.train({"objective": "binary", "num_leaves": 15, "verbose": -1, "num_threads": 2, "seed": 1},
                        lgb.Dataset(X, y), num_boost_round=30)
    forest = compile_booster(booster)
    assert forest.value.dtype == np.int16
    exact = {name: np.rint(booster.predict(corpus[name], raw_score=True) * 2.0**40).astype(np.int64)
             for name in ("X_members", "X_val_non")}
    rounded = threshold_bloom_bytes(score_batch(forest, corpus["X_members"]), score_batch(forest, corpus["X_val_non"]), corpus["w_val_non"])
    unrounded = threshold_bloom_bytes(exact["X_members"], exact["X_val_non"], corpus["w_val_non"])
    assert abs(rounded - unrounded) <= 0.005 * unrounded


def test_compiled_booster_reproduces_lightgbm_on_the_weighted_key_like_set(corpus):
    X = np.vstack([corpus["X_members"], corpus["X_train_non"]])
    y = np.r_[np.ones(len(corpus["X_members"])), np.zeros(len(corpus["X_train_non"]))]
    w = np.r_[np.ones(len(corpus["X_members"])), np.sqrt(corpus["w_train_non"])]
    booster = lgb.train({"objective": "binary", "num_leaves": 31, "learning_rate": 0.3, "verbose": -1,
                         "num_threads": 2, "seed": 1, "max_bin": 63}, lgb.Dataset(X, y, weight=w), num_boost_round=20)
    assert_matches_lightgbm(booster, compile_booster(booster), corpus["X_val_non"])
    half = compile_booster(booster, trees=7)
    assert half.trees == 7
    np.testing.assert_array_equal(half.tree_splits, compile_booster(booster).tree_splits[:7])


# AUC ------------------------------------------------------------------------------------------


def test_weighted_auc_is_the_mann_whitney_statistic():
    rng = np.random.default_rng(6)
    pos = rng.integers(0, 50, 400)
    neg = rng.integers(-10, 40, 700)  # integer scores: plenty of ties
    u = stats.mannwhitneyu(pos, neg, alternative="two-sided").statistic
    assert weighted_auc(pos, neg) == pytest.approx(u / (len(pos) * len(neg)), rel=1e-12)
    counts = rng.integers(1, 5, len(neg))
    assert weighted_auc(pos, neg, counts) == pytest.approx(weighted_auc(pos, np.repeat(neg, counts)), rel=1e-12)


# Fitting and choosing -----------------------------------------------------------------------

FAST = ModelSettings(leaves=(3, 15), learning_rates=(0.3,), max_trees=30, checkpoint_every=3, patience=3,
                     max_nodes_per_key=300, train_nonmembers=4000, min_leaf_rows=10)


@pytest.fixture(scope="module")
def fast_choice(corpus):
    return fit_model(**corpus, filter_bytes=threshold_bloom_bytes, settings=FAST)


def test_fit_model_prices_checkpoints_with_the_compiled_scores(corpus, fast_choice):
    forest = fast_choice.forest
    member_scores = score_batch(forest, corpus["X_members"])
    val_scores = score_batch(forest, corpus["X_val_non"])
    assert fast_choice.filter_bytes == threshold_bloom_bytes(member_scores, val_scores, corpus["w_val_non"])
    assert fast_choice.model_bytes > forest.nbytes
    assert fast_choice.total_bytes == fast_choice.model_bytes + fast_choice.filter_bytes
    assert fast_choice.total_bytes == min(row["total_bytes"] for row in fast_choice.candidates)
    assert fast_choice.auc == weighted_auc(member_scores, val_scores, corpus["w_val_non"])
    assert 0.9 < fast_choice.auc < 1.0
    assert fast_choice.params["leaves"] in FAST.leaves and fast_choice.trees == forest.trees > 0


def assert_budget_and_patience(choice, settings: ModelSettings) -> None:
    """Every priced row within the node budget; each candidate priced every `checkpoint_every`
    trees and stopped at its tree cap or `patience` checkpoints after its cheapest."""
    rows = choice.candidates
    assert all(row["nodes_per_key"] <= settings.max_nodes_per_key for row in rows)
    assert choice.forest.nodes_per_key <= settings.max_nodes_per_key
    for leaves in settings.leaves:
        for rate in settings.learning_rates:
            mine = [row for row in rows if (row["leaves"], row["learning_rate"]) == (leaves, rate)]
            cap = min(settings.max_trees, settings.max_nodes_per_key // (leaves - 1))
            every = settings.checkpoint_every
            assert [row["trees"] for row in mine] == [min(cap, every * (i + 1)) for i in range(len(mine))]
            best_at = min(range(len(mine)), key=lambda i: mine[i]["total_bytes"])
            after_best = len(mine) - 1 - best_at
            assert after_best <= settings.patience
            if after_best < settings.patience:  # it stopped for another reason: the tree cap
                assert mine[-1]["trees"] == cap


def test_fit_model_respects_the_node_budget_and_stops_on_patience(fast_choice):
    assert_budget_and_patience(fast_choice, FAST)


def test_fit_model_chooses_a_smaller_candidate_than_the_largest(fast_choice):
    """On 3,000 members the 15-leaf candidates separate a little better, but not by their bytes."""
    largest = max(fast_choice.candidates, key=lambda row: row["model_bytes"])
    assert fast_choice.model_bytes < largest["model_bytes"]
    assert fast_choice.total_bytes < largest["total_bytes"]
    baseline = fast_choice.candidates[0]
    assert baseline["trees"] == 0 and baseline["leaves"] is None
    assert baseline["filter_bytes"] == bloom_bits(3000, TARGET_FPR) / 8  # a plain Bloom filter
    assert fast_choice.total_bytes < baseline["total_bytes"]


def test_fit_model_keeps_no_model_when_none_pays_for_itself(corpus):
    """With 60 members a plain Bloom filter costs 72 bytes: no forest can pay for its own bytes."""
    few = dict(corpus, X_members=corpus["X_members"][:60])
    choice = fit_model(**few, filter_bytes=threshold_bloom_bytes, settings=FAST)
    assert choice.trees == 0 and choice.params["leaves"] is None
    assert choice.filter_bytes == bloom_bits(60, TARGET_FPR) / 8
    assert choice.auc == 0.5
    np.testing.assert_array_equal(score_batch(choice.forest, corpus["X_val_non"][:5]), [choice.forest.bias] * 5)


def test_fit_model_is_deterministic(corpus, fast_choice):
    again = fit_model(**corpus, filter_bytes=threshold_bloom_bytes, settings=FAST)
    assert again.forest.meta() == fast_choice.forest.meta()
    for name, array in fast_choice.forest.sections().items():
        np.testing.assert_array_equal(again.forest.sections()[name], array)


def test_fit_model_with_a_tight_budget_grows_only_what_fits(corpus):
    tight = dataclasses.replace(FAST, max_nodes_per_key=8, leaves=(3, 5))
    choice = fit_model(**corpus, filter_bytes=threshold_bloom_bytes, settings=tight)
    assert {row["leaves"] for row in choice.candidates} == {None, 3, 5}
    assert all(row["nodes_per_key"] <= 8 for row in choice.candidates)
    assert max(row["trees"] for row in choice.candidates if row["leaves"] == 5) == 2


@pytest.mark.parametrize(
    "change, message",
    [
        ({"weighting": "cube"}, "weighting must be one of"),
        ({"leaves": (7, 65)}, "leaves must list values from 2 to 64"),
        ({"learning_rates": ()}, "learning_rates must list"),
        ({"max_nodes_per_key": 5, "leaves": (7,)}, "below one tree of 7 leaves"),
        ({"patience": 0}, "patience must be at least 1"),
    ],
)
def test_model_settings_refuse_bad_values(change, message):
    with pytest.raises(ValueError, match=message):
        ModelSettings(**change)


def test_fit_model_refuses_bad_inputs(corpus):
    bad = [
        ({"X_members": corpus["X_members"].astype(np.float64)}, "X_members must be a float32 matrix"),
        ({"X_val_non": corpus["X_val_non"][:, :5]}, "disagree on the number of columns"),
        ({"X_train_non": corpus["X_train_non"][:0], "w_train_non": corpus["w_train_non"][:0]}, "X_train_non is empty"),
        ({"w_val_non": -corpus["w_val_non"]}, "w_val_non must hold one finite non-negative weight"),
        ({"w_train_non": corpus["w_train_non"][:10]}, "w_train_non must hold one"),
    ]
    for change, message in bad:
        with pytest.raises(ValueError, match=message):
            fit_model(**{**corpus, **change}, filter_bytes=threshold_bloom_bytes, settings=FAST)
