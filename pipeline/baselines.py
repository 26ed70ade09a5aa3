"""Baselines a learned filter is judged against: the best plain static filter, the one-threshold
learned filter and the ideal size.

Best plain static filter: what a demanding user would pick without any model, the smaller of a
Bloom filter of all members at the target F and a binary fuse filter (3- or 4-wise) with the
fewest fingerprint bits r whose rate 2^-r is at most F, each at its bytes as built
(`tamis.sizing`). At 200,000 members and 1%: Bloom 239,632 bytes; fuse 4-wise, r = 7 (0.78%), 193,536.

One-threshold learned filter (the learned Bloom filter of T. Kraska, A. Beutel, E. H. Chi, J. Dean,
N. Polyzotis, "The Case for Learned Index Structures", SIGMOD 2018, as analysed by M. Mitzenmacher,
"A Model for Learned Bloom Filters and Optimizing by Sandwiching", NeurIPS 2018): keys whose score
is at or above a threshold t answer yes; the members below t go into one backup Bloom filter. With
F_p(t) the share of non-member lookups scoring at or above t, the filter's false-positive rate is
F_p + (1 - F_p) f_b for a backup at rate f_b. For a fixed t the model's part F_p is fixed too, so the
best split of a target F gives the backup all that is left, f_b = (F - F_p) / (1 - F_p) (a lower f_b
only costs bits); t is feasible when F_p < F. `plan_single_threshold` picks the feasible t with the
fewest backup bits. In region terms it is a plan of two regions, [-inf, t) with a Bloom filter at
f_b and [t, +inf) answering yes, so the filters and package stages build it unchanged.

Ideal size: with k regions of divergence D = sum_i G_i log2(G_i / H_i) and unclamped KKT budgets
(see `tamis.regions`), the backup filters need n (log2(1/F) - D) bits at the information-
theoretic limit, times 1/ln 2 for Bloom filters; `ideal_bytes` adds the model's bytes to that. The
formula counts a region whose budget c G_i / H_i exceeds 1 as saving bits beyond answering yes, which
no filter can do, so when a budget clamps at 1 it is below what any filter on those regions reaches.
`clamped_ideal_bytes` is the reachable one: sum_i n_i log2(1 / f_i) / ln 2 with the KKT budgets
f_i = min(1, c G_i / H_i) (`tamis.budgets.allocate_fprs`), plus the model.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from tamis.budgets import FilterChoice, allocate_fprs
from tamis.sizing import BLOOM_OVERHEAD, FUSE_ARITIES, FUSE_MAX_WIDTH, bloom_bits, bloom_bits_of, bloom_bytes, fuse_bytes


@dataclass(frozen=True)
class StaticFilter:
    """A plain filter of every member, no model: its kind ("bloom" or "fuse"), stored bytes, the rate
    it is built for, and for "fuse" its arity and fingerprint width."""

    kind: str
    bytes: int
    fpr: float
    arity: int = 0
    width: int = 0


def best_static_filter(members: int, fpr: float) -> StaticFilter:
    """The smallest plain filter of `members` keys at a rate of at most fpr (see the module docstring)."""
    if not 0.0 < fpr < 1.0:
        raise ValueError(f"fpr must be in (0, 1), got {fpr!r}")
    candidates = [StaticFilter("bloom", bloom_bytes(members, fpr), fpr)]
    width = math.ceil(-math.log2(fpr) - 1e-12)  # the fewest bits with 2^-r <= fpr
    if width <= FUSE_MAX_WIDTH:
        candidates += [StaticFilter("fuse", fuse_bytes(members, arity, width), 2.0**-width, arity, width) for arity in FUSE_ARITIES]
    return min(candidates, key=lambda candidate: candidate.bytes)


@dataclass(frozen=True)
class SingleThreshold:
    """A one-threshold learned filter planned on validation scores.

    threshold: keys scoring >= threshold answer yes.
    members_below: members scoring below it (they fill the backup filter).
    share_above: F_p, the share of validation non-member lookups scoring >= threshold.
    backup_fpr: f_b = (target - F_p) / (1 - F_p).
    backup_bits: bloom_bits(members_below, backup_fpr) (0 when no member is below).
    expected_fpr: F_p + (1 - F_p) f_b, the rate predicted on validation lookups (= the target).
    """

    threshold: int
    members_below: int
    share_above: float
    backup_fpr: float
    backup_bits: int
    expected_fpr: float

    @property
    def boundaries(self) -> np.ndarray:
        """The region boundaries of this filter: [threshold]."""
        return np.array([self.threshold], dtype=np.int64)

    @property
    def fprs(self) -> np.ndarray:
        """The region budgets: the backup's rate below the threshold, 1 (answer yes) at or above."""
        return np.array([self.backup_fpr, 1.0])

    @property
    def filters(self) -> tuple[FilterChoice, FilterChoice]:
        """The region filters: a Bloom filter at the backup's rate below the threshold, none above."""
        return FilterChoice("bloom", self.backup_fpr), FilterChoice("yes", 1.0)


def plan_single_threshold(member_scores, nonmember_scores, nonmember_weights, target_fpr: float) -> SingleThreshold:
    """The threshold t minimising the backup Bloom filter's bits at target_fpr, and its budget.

    Only t = v + 1 for some validation score v needs to be tried: between two consecutive
    validation scores F_p(t) stays the same while the members below t only grow, so the lowest t of
    each such interval is the cheapest. The largest of them (above every validation score, F_p = 0)
    is always feasible and never worse than a plain Bloom filter of all members. Bits are counted as
    `bloom_bits` sizes the filter (rounded up); ties go to the lower threshold. `nonmember_weights` are lookup counts (None: one each); the non-members must be
    validation keys the model never trained on.
    """
    if not 0.0 < target_fpr < 1.0:
        raise ValueError(f"target_fpr must be in (0, 1), got {target_fpr!r}")
    members = _integer_scores(member_scores, "member_scores")
    nonmembers = _integer_scores(nonmember_scores, "nonmember_scores")
    if nonmembers.size == 0:
        raise ValueError("need at least one validation non-member score to estimate the share above a threshold")
    weights = np.ones(nonmembers.size) if nonmember_weights is None else np.asarray(nonmember_weights, dtype=np.float64)
    if weights.shape != nonmembers.shape or not np.isfinite(weights).all() or (weights < 0).any() or weights.sum() <= 0:
        raise ValueError("nonmember_weights must hold one finite lookup count >= 0 per non-member score, with a positive sum")

    values, first = np.unique(nonmembers, return_inverse=True)
    weight_at = np.bincount(first, weights=weights, minlength=values.size)
    thresholds = values + 1
    # share of lookups at or above v + 1, i.e. strictly above v: the weight of the values after v
    above = np.concatenate((np.cumsum(weight_at[::-1])[::-1][1:], [0.0])) / weights.sum()
    below = np.searchsorted(np.sort(members), thresholds, side="left")
    feasible = above < target_fpr
    backup = np.where(feasible, (target_fpr - above) / np.where(feasible, 1.0 - above, 1.0), 1.0)
    bits = bloom_bits_of(below, backup)
    bits[~feasible] = np.inf
    pick = int(np.argmin(bits))
    share_above, backup_fpr, count = float(above[pick]), float(backup[pick]), int(below[pick])
    return SingleThreshold(
        threshold=int(thresholds[pick]),
        members_below=count,
        share_above=share_above,
        backup_fpr=backup_fpr,
        backup_bits=bloom_bits(count, backup_fpr),
        expected_fpr=share_above + (1.0 - share_above) * backup_fpr,
    )


def ideal_bytes(members: int, fpr: float, kl_bits: float, model_bytes: float) -> float:
    """n (log2(1/F) - D) / ln 2 / 8 + model_bytes: Bloom backups at divergence D with no clamping.

    At n = 200,000, F = 1% and D = 4 bits that is 200,000 x 2.644 x 1.4427 / 8 = 95,357 bytes plus
    the model. A divergence beyond log2(1/F) would make the backup's share negative; it is 0 there.
    """
    if not 0.0 < fpr <= 1.0:
        raise ValueError(f"fpr must be in (0, 1], got {fpr!r}")
    return members * max(0.0, math.log2(1.0 / fpr) - kl_bits) * BLOOM_OVERHEAD / 8 + model_bytes


def clamped_ideal_bytes(member_counts, nonmember_shares, fpr: float, model_bytes: float) -> float:
    """sum_i n_i log2(1 / f_i) / ln 2 / 8 + model_bytes, with f the KKT budgets of these regions at fpr.

    Two regions of 100,000 members each, with lookup shares 0.995 and 0.005, at F = 2%: the budgets
    c G_i / H_i would be 1.5% and 200%, so the second clamps at 1 and the first takes what is left,
    f = 0.015 / 0.995; 100,000 log2(0.995 / 0.015) / ln 2 / 8 = 109,134 bytes, where `ideal_bytes`
    says 200,000 x 2.818 / ln 2 / 8 = 101,649.
    """
    counts = np.asarray(member_counts, dtype=np.float64)
    if counts.ndim != 1 or counts.sum() <= 0:
        raise ValueError("member_counts must be a 1-D array of per-region member counts with a positive sum")
    fprs = allocate_fprs(counts / counts.sum(), nonmember_shares, fpr)
    held = (counts > 0) & (fprs < 1.0)
    return float(np.sum(counts[held] * np.log2(1.0 / fprs[held]))) * BLOOM_OVERHEAD / 8 + model_bytes


def _integer_scores(scores, name: str) -> np.ndarray:
    array = np.asarray(scores)
    if array.ndim != 1 or (array.size and not np.issubdtype(array.dtype, np.integer)):
        raise ValueError(f"{name} must be a 1-D array of integer scores, got {array.dtype} of shape {array.shape}")
    return array.astype(np.int64, copy=False)
