"""Compiling a LightGBM booster into the integer forest the artifact stores (`tamis.trees.Forest`).

LightGBM's trees (`Booster.dump_model()`) become a Forest: thresholds snapped to float32 so that a
float32 feature compares with them exactly as LightGBM compares it in double, leaf values quantised
to integers at a power-of-two scale, so that every conforming reader sums the same integer score.
Training and choosing the model is `tamis.model`; this module only reads a booster's dump, so it
never imports lightgbm itself.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from tamis.format import CHILD_DTYPES, INT32_LIMIT, TREE_SPLITS_DTYPES, VALUE_DTYPES
from tamis.trees import Forest, narrowest_dtype

if TYPE_CHECKING:
    import lightgbm as lgb

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
