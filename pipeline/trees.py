"""The compiled model: a forest of binary decision trees with integer leaf values, and its evaluators.

A key's score is `bias + sum over trees of the value of the leaf the key reaches`, all integers, so
every conforming implementation computes the same score bit for bit (invariant 2). The integer
score divided by `scale` approximates the raw score (log-odds) of the gradient-boosted model it
was compiled from (`tamis.booster`).

Traversal rule, at an internal node with feature f and float32 threshold t: go to the right child
when x[f] > t, otherwise to the left child. For finite inputs this is the usual `x <= t goes left`;
a NaN input goes left (every comparison with NaN is false).

Stored layout (`sections()`; trees one after another, every array little-endian and 1-D):

    forest.tree_splits  uint8/16/32  (trees,)   internal nodes of each tree; a tree has splits + 1 leaves
    forest.feature      uint8        (splits,)  feature index of each internal node
    forest.threshold    float32      (splits,)  split threshold of each internal node
    forest.left         int8/16/32   (splits,)  left child code, local to the tree (see below)
    forest.right        int8/16/32   (splits,)  right child code, same dtype as left
    forest.value        int16/32     (leaves,)  quantised leaf values, leaf 0 of tree 0 first

A child code c >= 0 names internal node c of the same tree; c < 0 names leaf ~c (= -1 - c). Node 0
is the root of a tree with splits, and a child's code is always greater than its parent's, so no
chain of children can loop. Each tree holds a proper binary tree of at most 64 leaves: every
internal node but the root and every leaf has exactly one parent. Meta (`meta()`): features d,
trees, scale, bias (ints). `Forest.from_parts` checks all of this before anything is evaluated.

Evaluators: `score_batch`, `score_columns` and `leaf_indices` walk every tree of every row of a
chunk down one level per numpy step (see `_reached_nodes`), over a breadth-first copy of the trees
in which the two children of a node are adjacent, so a step is a few array gathers and one
comparison, with no Python per row; their cost follows the depth of the leaves the rows reach.
`score_values` and `score_row` walk one row down each tree in plain Python. These are the reference
evaluators; the compiled query path (`tamis.compiled`, chosen in `tamis.query`) walks the same
breadth-first arrays key by key and must give the same integer scores (tests/test_compiled.py).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from tamis.format import (
    CHILD_DTYPES,
    FEATURE_DTYPE,
    FOREST_META_KEYS,
    FOREST_SECTION_NAMES,
    FOREST_SECTION_PREFIX,
    INT32_LIMIT,
    MAX_TREE_LEAVES,
    MAX_TREES,
    THRESHOLD_DTYPE,
    TREE_SPLITS_DTYPES,
    VALUE_DTYPES,
)

# Rows walked per numpy pass in the batch evaluators: the walk's arrays (trees x rows node indices)
# and the chunk's feature columns then stay in the CPU's second-level cache. Measured on one core
# of a shared 2-core machine for the demo forest (7 trees of 63 leaves, depths 12 to 17) on
# 200,000 demo keys: 512 to 4,096 rows a chunk within about 20% of each other, about 0.5 to
# 0.8 us a row, noise included.
CHUNK_ROWS = 1_024
# Walks that have reached a leaf are dropped every this many levels: the demo forest's leaves lie
# 9 levels deep on average but up to 17, and dropping costs about one level's work. Every 3 to 5
# levels measured alike there, about 40% faster than walking every row to the deepest level.
COMPACT_LEVELS = 4


def narrowest_dtype(low: int, high: int, candidates: tuple[np.dtype, ...]) -> np.dtype:
    """The first dtype of `candidates` whose range holds both `low` and `high`."""
    for dtype in candidates:
        info = np.iinfo(dtype)
        if info.min <= low and high <= info.max:
            return dtype
    raise ValueError(f"values from {low} to {high} fit none of {[str(d) for d in candidates]}")


@dataclass(frozen=True, eq=False)
class Forest:
    """A compiled forest: the stored arrays plus the integers of `meta()`. Construction validates."""

    features: int
    scale: int
    bias: int
    tree_splits: np.ndarray
    feature: np.ndarray
    threshold: np.ndarray
    left: np.ndarray
    right: np.ndarray
    value: np.ndarray

    def __post_init__(self) -> None:
        for name in FOREST_SECTION_NAMES:
            array = getattr(self, name)
            if not isinstance(array, np.ndarray):
                raise ValueError(f"forest section {FOREST_SECTION_PREFIX}{name} must be a numpy array, got {type(array).__name__}")
            # A private read-only copy: the arrays cannot change after they have been checked.
            frozen = array.copy()
            frozen.flags.writeable = False
            object.__setattr__(self, name, frozen)
        _check_forest(self)

    @property
    def trees(self) -> int:
        return len(self.tree_splits)

    @property
    def nbytes(self) -> int:
        """Bytes of the stored sections (meta and container framing not included)."""
        return sum(a.nbytes for a in self.sections().values())

    @property
    def max_splits(self) -> int:
        """Internal nodes of the largest tree."""
        return int(self.tree_splits.max(initial=0))

    @property
    def nodes_per_key(self) -> int:
        """Internal nodes per key with every tree padded to the largest one: the query-cost measure
        the model stage budgets, and a bound on the node tests of any evaluator here."""
        return self.trees * self.max_splits

    def sections(self) -> dict[str, np.ndarray]:
        return {FOREST_SECTION_PREFIX + name: getattr(self, name) for name in FOREST_SECTION_NAMES}

    def meta(self) -> dict:
        return {"features": self.features, "trees": self.trees, "scale": self.scale, "bias": self.bias}

    @classmethod
    def from_parts(cls, meta: Mapping, sections: Mapping[str, np.ndarray]) -> Forest:
        """Rebuild a forest from `meta()` and `sections()` as read back from an artifact.

        Raises ValueError naming the first thing that is wrong: a missing or extra key, a dtype,
        a length, a child index out of range or out of order, a feature index >= d.
        """
        if not isinstance(meta, Mapping) or set(meta) != set(FOREST_META_KEYS):
            got = sorted(meta) if isinstance(meta, Mapping) else type(meta).__name__
            raise ValueError(f"forest meta must have exactly the keys {list(FOREST_META_KEYS)}, got {got}")
        expected = {FOREST_SECTION_PREFIX + name for name in FOREST_SECTION_NAMES}
        present = {name for name in sections if name.startswith(FOREST_SECTION_PREFIX)}
        if present != expected:
            raise ValueError(
                f"forest sections must be {sorted(expected)}; missing {sorted(expected - present)}, "
                f"unexpected {sorted(present - expected)}"
            )
        arrays = {name: sections[FOREST_SECTION_PREFIX + name] for name in FOREST_SECTION_NAMES}
        forest = cls(features=meta["features"], scale=meta["scale"], bias=meta["bias"], **arrays)
        if type(meta["trees"]) is not int or forest.trees != meta["trees"]:
            raise ValueError(f"forest meta says {meta['trees']} trees but forest.tree_splits holds {forest.trees}")
        return forest

    # Derived evaluation layouts, built on first use from the validated stored arrays.

    @cached_property
    def _levels(self) -> _LevelLayout:
        return _level_layout(self)

    @cached_property
    def _row(self) -> _RowLayout:
        return _row_layout(self)


def _check_dtype(name: str, array: np.ndarray, allowed: tuple[np.dtype, ...]) -> None:
    if array.dtype not in allowed:
        raise ValueError(
            f"forest section {FOREST_SECTION_PREFIX}{name} has dtype {array.dtype.str}; expected one of {[d.str for d in allowed]}"
        )
    if array.ndim != 1:
        raise ValueError(f"forest section {FOREST_SECTION_PREFIX}{name} must be 1-D, got shape {array.shape}")


def _check_forest(forest: Forest) -> None:
    """Every check that keeps the evaluators in range and loop-free; raises ValueError."""
    for key in ("features", "scale", "bias"):
        if type(getattr(forest, key)) is not int:
            raise ValueError(f"forest {key} must be a Python int, got {getattr(forest, key)!r}")
    if not 1 <= forest.features <= 255:
        raise ValueError(f"forest features must be from 1 to 255 (uint8 feature index), got {forest.features}")
    if forest.scale < 1:
        raise ValueError(f"forest scale must be a positive integer, got {forest.scale}")
    _check_dtype("tree_splits", forest.tree_splits, TREE_SPLITS_DTYPES)
    _check_dtype("feature", forest.feature, (FEATURE_DTYPE,))
    _check_dtype("threshold", forest.threshold, (THRESHOLD_DTYPE,))
    _check_dtype("left", forest.left, CHILD_DTYPES)
    _check_dtype("right", forest.right, (forest.left.dtype,))
    _check_dtype("value", forest.value, VALUE_DTYPES)

    if forest.trees > MAX_TREES:
        raise ValueError(f"the forest has {forest.trees} trees; at most {MAX_TREES} are supported")
    splits = forest.tree_splits.astype(np.int64)
    if forest.trees and int(splits.max()) >= MAX_TREE_LEAVES:
        tree = int(np.argmax(splits >= MAX_TREE_LEAVES))
        raise ValueError(f"forest tree {tree} has {splits[tree] + 1} leaves; at most {MAX_TREE_LEAVES} are supported")
    total_splits = int(splits.sum())
    for name in ("feature", "threshold", "left", "right"):
        if len(getattr(forest, name)) != total_splits:
            raise ValueError(
                f"forest section {FOREST_SECTION_PREFIX}{name} has {len(getattr(forest, name))} entries; "
                f"tree_splits sums to {total_splits}"
            )
    if len(forest.value) != total_splits + forest.trees:
        raise ValueError(
            f"forest section {FOREST_SECTION_PREFIX}value has {len(forest.value)} entries; "
            f"{forest.trees} trees with {total_splits} splits have {total_splits + forest.trees} leaves"
        )
    if total_splits and int(forest.feature.max()) >= forest.features:
        bad = int(np.argmax(forest.feature >= forest.features))
        raise ValueError(f"forest node {bad} splits on feature {forest.feature[bad]}, but there are only {forest.features}")
    if not np.isfinite(forest.threshold).all():
        bad = int(np.argmax(~np.isfinite(forest.threshold)))
        raise ValueError(f"forest node {bad} has a non-finite threshold {forest.threshold[bad]}")
    _check_children(forest, splits)
    _check_score_range(forest, splits)


def _check_children(forest: Forest, splits: np.ndarray) -> None:
    """Child codes in range, after their parent, and each node but the roots used exactly once."""
    tree_of = np.repeat(np.arange(forest.trees), splits)
    local = np.arange(len(tree_of)) - np.repeat(np.cumsum(splits) - splits, splits)
    node_base = np.repeat(np.cumsum(splits) - splits, splits)
    leaf_base = np.repeat(np.cumsum(splits + 1) - (splits + 1), splits)
    tree_size = splits[tree_of]
    internal_hits = np.zeros(len(tree_of), dtype=np.int64)
    leaf_hits = np.zeros(len(forest.value), dtype=np.int64)
    for side in ("left", "right"):
        code = getattr(forest, side).astype(np.int64)
        is_leaf = code < 0
        bad = (is_leaf & (~code > tree_size)) | (~is_leaf & ((code >= tree_size) | (code <= local)))
        if bad.any():
            node = int(np.argmax(bad))
            raise ValueError(
                f"forest {side} child code {code[node]} of node {local[node]} in tree {tree_of[node]} is out of range: "
                f"internal children must lie after their parent and below {tree_size[node]}, leaves in "
                f"-1..{-1 - tree_size[node]}"
            )
        np.add.at(internal_hits, (node_base + code)[~is_leaf], 1)
        np.add.at(leaf_hits, (leaf_base + ~code)[is_leaf], 1)
    internal_expected = (local > 0).astype(np.int64)  # the root has no parent
    leaf_expected = (np.repeat(splits, splits + 1) > 0).astype(np.int64)  # a lone leaf is its tree's root
    if (internal_hits != internal_expected).any():
        node = int(np.argmax(internal_hits != internal_expected))
        raise ValueError(
            f"forest node {local[node]} of tree {tree_of[node]} is the child of {internal_hits[node]} nodes; "
            f"expected {internal_expected[node]}"
        )
    if (leaf_hits != leaf_expected).any():
        leaf = int(np.argmax(leaf_hits != leaf_expected))
        raise ValueError(f"forest leaf {leaf} (global index) is the child of {leaf_hits[leaf]} nodes; expected {leaf_expected[leaf]}")


def _check_score_range(forest: Forest, splits: np.ndarray) -> None:
    worst = abs(forest.bias)
    if forest.trees:
        leaf_starts = np.cumsum(splits + 1) - (splits + 1)
        worst += int(np.maximum.reduceat(np.abs(forest.value.astype(np.int64)), leaf_starts).sum())
    if worst > INT32_LIMIT:
        raise ValueError(f"forest scores could reach {worst}, beyond the int32 range; recompile with a smaller scale")


@dataclass(frozen=True)
class _LevelLayout:
    """Arrays for the batch evaluator: every node of every tree, leaves included, in one numbering.

    Within a tree, nodes are numbered breadth first, so the two children of an internal node are
    adjacent: `first_child` holds the left one and the right one is first_child + 1. A leaf is its
    own first child with threshold +inf, so a step from a leaf (x > +inf is never true) stays there.
    `feature` is each node's feature index (0 at leaves), `value` each leaf's value (0 at internal
    nodes), `leaf_number` each leaf's number within its tree, `roots` each tree's root, `depth` the
    most steps any tree needs from root to leaf.
    """

    feature: np.ndarray
    threshold: np.ndarray
    first_child: np.ndarray
    is_leaf: np.ndarray
    value: np.ndarray
    leaf_number: np.ndarray
    roots: np.ndarray
    depth: int

    @property
    def kernel_arrays(self) -> tuple[np.ndarray, ...]:
        """The forest arguments of the `tamis.compiled` tree kernels, in their order."""
        return self.roots, self.feature, self.threshold, self.first_child, self.value


def _breadth_first(left: list[int], right: list[int]) -> tuple[list[int], int]:
    """(the child codes of one tree in breadth-first order, from the root, and the tree's depth)."""
    order, depth_of = [0 if left else -1], [0]
    for code, depth in zip(order, depth_of):  # the lists grow while being walked: a queue
        if code >= 0:
            order += [left[code], right[code]]
            depth_of += [depth + 1, depth + 1]
    return order, max(depth_of)


def _level_layout(forest: Forest) -> _LevelLayout:
    feature: list[int] = []
    threshold: list[float] = []
    first_child: list[int] = []
    value: list[int] = []
    leaf_number: list[int] = []
    roots: list[int] = []
    depth = 0
    stored_feature, stored_threshold = forest.feature.tolist(), forest.threshold.tolist()
    left, right, stored_value = forest.left.tolist(), forest.right.tolist(), forest.value.tolist()
    node = leaf = 0
    for count in forest.tree_splits.tolist():
        order, tree_depth = _breadth_first(left[node : node + count], right[node : node + count])
        base = len(feature)
        roots.append(base)
        depth = max(depth, tree_depth)
        next_child = base + 1  # breadth first: children are numbered in the order their parents are
        for code in order:
            if code >= 0:
                feature.append(stored_feature[node + code])
                threshold.append(stored_threshold[node + code])
                first_child.append(next_child)
                next_child += 2
                value.append(0)
                leaf_number.append(-1)
            else:
                feature.append(0)
                threshold.append(math.inf)
                first_child.append(len(first_child))
                value.append(stored_value[leaf + ~code])
                leaf_number.append(~code)
        node, leaf = node + count, leaf + count + 1
    first = np.array(first_child, dtype=np.intp)
    return _LevelLayout(
        feature=np.array(feature, dtype=np.intp),
        threshold=np.array(threshold, dtype=np.float32),
        first_child=first,
        is_leaf=first == np.arange(len(first)),
        value=np.array(value, dtype=np.int64),
        leaf_number=np.array(leaf_number, dtype=np.int32),
        roots=np.array(roots, dtype=np.intp),
        depth=depth,
    )


@dataclass(frozen=True)
class _RowLayout:
    """Python lists for `score_row`: codes are global (internal index, or ~global leaf index)."""

    roots: list[int]
    column: list[int]
    threshold: list[float]
    left: list[int]
    right: list[int]
    value: list[int]


def _row_layout(forest: Forest) -> _RowLayout:
    splits = forest.tree_splits.astype(np.int64)
    node_base = np.cumsum(splits) - splits
    leaf_base = np.cumsum(splits + 1) - (splits + 1)
    tree_of = np.repeat(np.arange(forest.trees), splits)

    def global_codes(local_codes: np.ndarray) -> list[int]:
        code = local_codes.astype(np.int64)
        return np.where(code >= 0, node_base[tree_of] + code, ~(leaf_base[tree_of] + ~code)).tolist()

    roots = np.where(splits > 0, node_base, ~leaf_base).tolist()
    return _RowLayout(
        roots=roots,
        column=forest.feature.tolist(),
        threshold=forest.threshold.tolist(),
        left=global_codes(forest.left),
        right=global_codes(forest.right),
        value=forest.value.tolist(),
    )


def _check_matrix(forest: Forest, X: np.ndarray, features_axis: int = 1) -> None:
    expected = "(n, {d})" if features_axis == 1 else "({d}, n)"
    shape = expected.format(d=forest.features)
    if not isinstance(X, np.ndarray) or X.dtype != np.float32 or X.ndim != 2 or X.shape[features_axis] != forest.features:
        got = f"{X.dtype} array of shape {X.shape}" if isinstance(X, np.ndarray) else type(X).__name__
        raise ValueError(f"forest expects a float32 feature matrix of shape {shape}, got {got}")


def _reached_nodes(layout: _LevelLayout, flat: np.ndarray, n: int, start: int, rows: int) -> np.ndarray:
    """The node every tree's walk ends at, (trees * rows,), for rows start..start+rows of a
    feature-major matrix (d, n) flattened to `flat`: tree t of row r at position t * rows + r.

    All walks advance one level per numpy step. Every COMPACT_LEVELS levels the walks that have
    reached a leaf are dropped, so the work follows the depth each walk needs, not the deepest.
    """
    feature_base = layout.feature * n  # x[f, r] is flat[f * n + r]
    row = np.tile(np.arange(start, start + rows, dtype=np.intp), len(layout.roots))
    node = np.repeat(layout.roots, rows)
    reached = node
    walking = np.arange(len(node))  # positions in `reached` still walking, in step with node and row
    level = 0
    while level < layout.depth and len(node):
        for _ in range(min(COMPACT_LEVELS, layout.depth - level)):
            x = flat.take(feature_base.take(node) + row)
            node = layout.first_child.take(node) + (x > layout.threshold.take(node))
        level += COMPACT_LEVELS
        reached[walking] = node
        keep = np.flatnonzero(~layout.is_leaf.take(node))
        node, row, walking = node[keep], row[keep], walking[keep]
    return reached


def _leaves_by_chunk(forest: Forest, columns: np.ndarray):
    """Yield (start, reached nodes (trees, rows)) per chunk of CHUNK_ROWS rows of columns (d, n)."""
    layout = forest._levels
    n = columns.shape[1]
    flat = np.ascontiguousarray(columns).reshape(-1)
    for start in range(0, n, CHUNK_ROWS):
        rows = min(CHUNK_ROWS, n - start)
        yield start, _reached_nodes(layout, flat, n, start, rows).reshape(forest.trees, rows)


def score_columns(forest: Forest, columns: np.ndarray) -> np.ndarray:
    """Integer scores (int64, shape (n,)) of a feature-major float32 matrix (d, n): one row per
    feature, as `tamis.features.featurize_columns` gives it."""
    _check_matrix(forest, columns, features_axis=0)
    scores = np.full(columns.shape[1], forest.bias, dtype=np.int64)
    if forest.trees == 0:
        return scores
    value = forest._levels.value
    for start, reached in _leaves_by_chunk(forest, columns):
        scores[start : start + reached.shape[1]] += value.take(reached).sum(axis=0)
    return scores


def score_batch(forest: Forest, X: np.ndarray) -> np.ndarray:
    """Integer scores (int64, shape (n,)) of the rows of a float32 matrix X of shape (n, d)."""
    _check_matrix(forest, X)
    scores = np.empty(len(X), dtype=np.int64)
    for start in range(0, len(X), CHUNK_ROWS):
        block = X[start : start + CHUNK_ROWS]
        scores[start : start + len(block)] = score_columns(forest, np.ascontiguousarray(block.T))
    return scores


def leaf_indices(forest: Forest, X: np.ndarray) -> np.ndarray:
    """Leaf reached in each tree, (n, trees) int32, as leaf numbers within each tree."""
    _check_matrix(forest, X)
    out = np.empty((len(X), forest.trees), dtype=np.int32)
    if forest.trees == 0:
        return out
    leaf_number = forest._levels.leaf_number
    for start in range(0, len(X), CHUNK_ROWS):
        block = X[start : start + CHUNK_ROWS]
        for _, reached in _leaves_by_chunk(forest, np.ascontiguousarray(block.T)):
            out[start : start + len(block)] = leaf_number.take(reached).T
    return out


def score_values(forest: Forest, values: list[float]) -> int:
    """Integer score of one row given as a list of d Python floats (each a float32 value, as
    `tamis.features.featurize_one` returns): a plain Python walk, the same answer as score_batch.

    A float32 value compares with a float32 threshold the same way in float64, so no rounding
    happens here.
    """
    layout = forest._row
    column, threshold, left, right, value = layout.column, layout.threshold, layout.left, layout.right, layout.value
    total = forest.bias
    for node in layout.roots:
        while node >= 0:
            node = right[node] if values[column[node]] > threshold[node] else left[node]
        total += value[~node]
    return total


def score_row(forest: Forest, x: np.ndarray) -> int:
    """Integer score of one float32 row of d features (`score_values` of its values)."""
    if not isinstance(x, np.ndarray) or x.dtype != np.float32 or x.shape != (forest.features,):
        got = f"{x.dtype} array of shape {x.shape}" if isinstance(x, np.ndarray) else type(x).__name__
        raise ValueError(f"forest expects a float32 row of {forest.features} features, got {got}")
    return score_values(forest, x.tolist())
