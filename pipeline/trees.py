"""The compiled model: a forest of binary decision trees with integer leaf values, and its evaluators.

A key's score is `bias + sum over trees of the value of the leaf the key reaches`, all integers, so
every conforming implementation computes the same score bit for bit (invariant 2). The integer
score divided by `scale` approximates the raw score (log-odds) of the gradient-boosted model it
was compiled from (`pipeline.model`).

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

Evaluators: `score_batch` and `leaf_indices` test every internal node of every tree against a
chunk of rows at once and find each tree's leaf by bit arithmetic (see `_exit_positions`), so
their cost is trees x splits per row, with no data-dependent loop; `score_row` walks one row down
each tree in plain Python, at most `splits` steps per tree.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from functools import cached_property

import numpy as np

SECTION_PREFIX = "forest."
SECTION_NAMES = ("tree_splits", "feature", "threshold", "left", "right", "value")
META_KEYS = ("features", "trees", "scale", "bias")

TREE_SPLITS_DTYPES = tuple(np.dtype(t).newbyteorder("<") for t in ("u1", "u2", "u4"))
FEATURE_DTYPE = np.dtype("<u1")
THRESHOLD_DTYPE = np.dtype("<f4")
CHILD_DTYPES = tuple(np.dtype(t).newbyteorder("<") for t in ("i1", "i2", "i4"))
VALUE_DTYPES = tuple(np.dtype(t).newbyteorder("<") for t in ("i2", "i4"))

# Scores fit a signed 32-bit accumulator: |bias| plus the largest |leaf value| of every tree must
# stay below 2^31, so an implementation that sums in int32 gets the same answer as our int64 sum.
INT32_LIMIT = 2**31 - 1

# The batch evaluator keeps one bit per leaf of a tree in an unsigned integer of at most 64 bits.
MAX_TREE_LEAVES = 64
FLOAT32_EXPONENT_BIAS = 127  # IEEE 754 binary32: 2^k is stored with exponent field k + 127

# Rows scored per numpy pass in `score_batch`. The work arrays (node slots x rows) then stay in the
# CPU's second-level cache for forests of a few hundred nodes. Measured on one core for 30 trees of
# 15 leaves on 1,000,000 rows of 89 features: 256 or 512 rows a chunk score about 1,000,000 rows
# a second, 2,048 or 8,192 rows about 800,000 (the speed test in tests/test_trees.py).
CHUNK_ROWS = 512


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
        for name in SECTION_NAMES:
            array = getattr(self, name)
            if not isinstance(array, np.ndarray):
                raise ValueError(f"forest section {SECTION_PREFIX}{name} must be a numpy array, got {type(array).__name__}")
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
        """Node tests `score_batch` makes per key: every tree padded to the largest one."""
        return self.trees * self.max_splits

    def sections(self) -> dict[str, np.ndarray]:
        return {SECTION_PREFIX + name: getattr(self, name) for name in SECTION_NAMES}

    def meta(self) -> dict:
        return {"features": self.features, "trees": self.trees, "scale": self.scale, "bias": self.bias}

    @classmethod
    def from_parts(cls, meta: Mapping, sections: Mapping[str, np.ndarray]) -> Forest:
        """Rebuild a forest from `meta()` and `sections()` as read back from an artifact.

        Raises ValueError naming the first thing that is wrong: a missing or extra key, a dtype,
        a length, a child index out of range or out of order, a feature index >= d.
        """
        if not isinstance(meta, Mapping) or set(meta) != set(META_KEYS):
            got = sorted(meta) if isinstance(meta, Mapping) else type(meta).__name__
            raise ValueError(f"forest meta must have exactly the keys {list(META_KEYS)}, got {got}")
        expected = {SECTION_PREFIX + name for name in SECTION_NAMES}
        present = {name for name in sections if name.startswith(SECTION_PREFIX)}
        if present != expected:
            raise ValueError(
                f"forest sections must be {sorted(expected)}; missing {sorted(expected - present)}, "
                f"unexpected {sorted(present - expected)}"
            )
        arrays = {name: sections[SECTION_PREFIX + name] for name in SECTION_NAMES}
        forest = cls(features=meta["features"], scale=meta["scale"], bias=meta["bias"], **arrays)
        if type(meta["trees"]) is not int or forest.trees != meta["trees"]:
            raise ValueError(f"forest meta says {meta['trees']} trees but forest.tree_splits holds {forest.trees}")
        return forest

    # Derived evaluation layouts, built on first use from the validated stored arrays.

    @cached_property
    def _batch(self) -> _BatchLayout:
        return _batch_layout(self)

    @cached_property
    def _row(self) -> _RowLayout:
        return _row_layout(self)


def _check_dtype(name: str, array: np.ndarray, allowed: tuple[np.dtype, ...]) -> None:
    if array.dtype not in allowed:
        raise ValueError(
            f"forest section {SECTION_PREFIX}{name} has dtype {array.dtype.str}; expected one of {[d.str for d in allowed]}"
        )
    if array.ndim != 1:
        raise ValueError(f"forest section {SECTION_PREFIX}{name} must be 1-D, got shape {array.shape}")


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

    splits = forest.tree_splits.astype(np.int64)
    if forest.trees and int(splits.max()) >= MAX_TREE_LEAVES:
        tree = int(np.argmax(splits >= MAX_TREE_LEAVES))
        raise ValueError(f"forest tree {tree} has {splits[tree] + 1} leaves; at most {MAX_TREE_LEAVES} are supported")
    total_splits = int(splits.sum())
    for name in ("feature", "threshold", "left", "right"):
        if len(getattr(forest, name)) != total_splits:
            raise ValueError(
                f"forest section {SECTION_PREFIX}{name} has {len(getattr(forest, name))} entries; "
                f"tree_splits sums to {total_splits}"
            )
    if len(forest.value) != total_splits + forest.trees:
        raise ValueError(
            f"forest section {SECTION_PREFIX}value has {len(forest.value)} entries; "
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
class _BatchLayout:
    """Arrays for the batch evaluator, every tree padded to `splits` internal node slots.

    A tree's leaves are numbered by position from left to right. `used` lists the features the
    forest splits on; `column` (an index into `used`), `threshold` and `left_leaves` give each node
    slot's feature, threshold (+inf in padding, which never fires) and the bitmask of the
    positions of the leaves in its left subtree. `position_value` and
    `position_leaf` give, at t * (splits + 1) + position, that leaf's value and its leaf number;
    `tree_base` holds t * (splits + 1) - FLOAT32_EXPONENT_BIAS (see `_exit_positions`).
    """

    splits: int
    used: np.ndarray
    column: np.ndarray
    threshold: np.ndarray
    left_leaves: np.ndarray
    position_value: np.ndarray
    position_leaf: np.ndarray
    tree_base: np.ndarray


def _leaf_order(left: list[int], right: list[int]) -> tuple[list[int], list[int]]:
    """(leaf numbers from left to right, left-subtree leaf bitmask of each internal node) of one tree."""
    order: list[int] = []
    left_mask = [0] * len(left)

    def walk(code: int) -> int:  # recursion depth <= splits <= MAX_TREE_LEAVES - 1
        if code < 0:
            order.append(~code)
            return 1 << (len(order) - 1)
        under_left = walk(left[code])
        left_mask[code] = under_left
        return under_left | walk(right[code])

    walk(0 if left else -1)
    return order, left_mask


def _batch_layout(forest: Forest) -> _BatchLayout:
    splits = forest.tree_splits.astype(np.int64)
    width = int(splits.max(initial=0))
    mask_dtype = narrowest_dtype(0, (1 << (width + 1)) - 1, tuple(np.dtype(t) for t in ("u1", "u2", "u4", "u8")))
    column = np.zeros(forest.trees * width, dtype=np.intp)
    threshold = np.full(forest.trees * width, np.inf, dtype=np.float32)
    left_leaves = np.zeros(forest.trees * width, dtype=mask_dtype)
    position_value = np.zeros(forest.trees * (width + 1), dtype=np.int64)
    position_leaf = np.zeros(forest.trees * (width + 1), dtype=np.intp)
    left, right, value = forest.left.tolist(), forest.right.tolist(), forest.value.tolist()
    node, leaf = 0, 0
    for tree, count in enumerate(splits.tolist()):
        order, left_mask = _leaf_order(left[node : node + count], right[node : node + count])
        slots = slice(tree * width, tree * width + count)
        column[slots] = forest.feature[node : node + count]
        threshold[slots] = forest.threshold[node : node + count]
        left_leaves[slots] = left_mask
        positions = slice(tree * (width + 1), tree * (width + 1) + count + 1)
        position_leaf[positions] = order
        position_value[positions] = [value[leaf + k] for k in order]
        node, leaf = node + count, leaf + count + 1
    tree_base = (np.arange(forest.trees, dtype=np.intp) * (width + 1) - FLOAT32_EXPONENT_BIAS)[:, None]
    used, column = np.unique(column, return_inverse=True)
    return _BatchLayout(
        width, used, column, threshold[:, None], left_leaves[:, None], position_value, position_leaf, tree_base
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


def _check_matrix(forest: Forest, X: np.ndarray) -> None:
    if not isinstance(X, np.ndarray) or X.dtype != np.float32 or X.ndim != 2 or X.shape[1] != forest.features:
        got = f"{X.dtype} array of shape {X.shape}" if isinstance(X, np.ndarray) else type(X).__name__
        raise ValueError(f"forest expects a float32 feature matrix of shape (n, {forest.features}), got {got}")


def _exit_positions(forest: Forest, X: np.ndarray):
    """Yield (start, positions) per chunk of rows; positions (trees, rows) index position_value.

    Every internal node whose test sends a row right (x > threshold) rules out the leaves of its
    left subtree; the leaf the row reaches is the leftmost leaf not ruled out (the exit-leaf
    property of QuickScorer: Lucchese et al., SIGIR 2015). So each chunk needs one comparison per
    node and no data-dependent walk: the cost is trees x splits per row, whatever the depth.
    """
    layout = forest._batch
    for start in range(0, len(X), CHUNK_ROWS):
        block = X[start : start + CHUNK_ROWS]
        # The used columns, transposed once (a contiguous row per feature), then one row per node
        # slot: measured twice as fast as gathering node slots straight from the row-major block.
        values = block[:, layout.used].T.copy().take(layout.column, axis=0)  # (node slots, rows)
        fired = np.greater(values, layout.threshold).view(np.uint8)
        ruled_out = np.multiply(fired, layout.left_leaves)
        excluded = np.bitwise_or.reduce(ruled_out.reshape(forest.trees, layout.splits, len(block)), axis=1)
        remaining = ~excluded
        lowest = remaining & np.negative(remaining)  # the lowest set bit alone: 2^position
        # 2^position converts to float32 exactly; its biased exponent field (bits 23-30) holds
        # position + 127, and tree_base already subtracts the 127.
        exponent = np.right_shift(lowest.astype(np.float32).view(np.int32), 23)
        yield start, exponent + layout.tree_base


def score_batch(forest: Forest, X: np.ndarray) -> np.ndarray:
    """Integer scores (int64, shape (n,)) of the rows of a float32 matrix X of shape (n, d)."""
    _check_matrix(forest, X)
    scores = np.full(len(X), forest.bias, dtype=np.int64)
    if forest.trees == 0:
        return scores
    value = forest._batch.position_value
    for start, positions in _exit_positions(forest, X):
        scores[start : start + positions.shape[1]] += value.take(positions).sum(axis=0)
    return scores


def leaf_indices(forest: Forest, X: np.ndarray) -> np.ndarray:
    """Leaf reached in each tree, (n, trees) int32, as leaf numbers within each tree."""
    _check_matrix(forest, X)
    out = np.empty((len(X), forest.trees), dtype=np.int32)
    if forest.trees == 0:
        return out
    leaf = forest._batch.position_leaf
    for start, positions in _exit_positions(forest, X):
        out[start : start + positions.shape[1]] = leaf.take(positions).T
    return out


def score_row(forest: Forest, x: np.ndarray) -> int:
    """Integer score of one float32 row of d features: a plain Python walk, same answer as score_batch."""
    if not isinstance(x, np.ndarray) or x.dtype != np.float32 or x.shape != (forest.features,):
        got = f"{x.dtype} array of shape {x.shape}" if isinstance(x, np.ndarray) else type(x).__name__
        raise ValueError(f"forest expects a float32 row of {forest.features} features, got {got}")
    layout = forest._row
    xs = x.tolist()
    column, threshold, left, right, value = layout.column, layout.threshold, layout.left, layout.right, layout.value
    total = forest.bias
    for node in layout.roots:
        while node >= 0:
            node = right[node] if xs[column[node]] > threshold[node] else left[node]
        total += value[~node]
    return total
