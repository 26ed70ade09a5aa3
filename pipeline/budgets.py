"""Budgets: per region, the filter kind, fingerprint width and false-positive budget that make the
artifact smallest at the aim.

Region i holds n_i members and a share H_i of the non-member lookups. Its filter is one of

- "yes": no filter, f_i = 1, no bytes;
- "fuse" with r-bit fingerprints, r = 1..32: f_i = 2^-r, the bytes of the cheaper of the 3-wise and
  4-wise binary fuse filters of n_i keys (`tamis.sizing.filter_bytes`, size factors and all);
- "bloom" at any f_i in (0, 1): a_i ln(1/f_i) + SECTION_BYTES bytes with a_i = n_i / (8 (ln 2)^2),
  the Bloom formula before its rounding to whole words;

and a region without members answers "no" (f_i = 0, no bytes). `choose_filters` minimises
sum_i bytes_i subject to sum_i H_i f_i <= aim and every f_i <= max_fpr, exactly:

1. Lagrangian bound. For a multiplier lam >= 0 each region on its own minimises bytes + lam H_i f
   (a Bloom filter in closed form, f = a_i / (lam H_i)), and L(lam) = sum of those minima - lam aim
   is below the optimum for every lam (weak duality). Its slope sum_i H_i f_i(lam) - aim falls as
   lam grows, so bisection finds the best bound; the choice on the feasible side of it meets the aim.
2. Exact Bloom budgets. For a choice of classes (yes, fuse r, bloom per region) the Bloom regions
   share what the others leave of the aim by the KKT rule f_i = min(max_fpr, c a_i / H_i)
   (`allocate_fprs`), which is exact for that convex part.
3. Branch and bound. When the bound is below the best choice found, options whose reduced cost at
   the node's lam (the bound with that one region's option swapped, still a valid bound) reaches
   the best are dropped for every region of the subtree; then the next region's class is fixed to
   each option left in turn, cheapest first, and each child is bounded properly and explored. A node is dropped only when a bound proves it cannot win, so the
   result is optimal (tests/test_budgets.py compares it with brute-force enumeration).

`allocate_fprs` is also the partitioned learned Bloom filter's budget rule (Vaidya, Knorr,
Mitzenmacher, Kraska, ICLR 2021): with Bloom filters only and no cap, it is the whole answer.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from tamis.sizing import FUSE_ARITIES, FUSE_MAX_WIDTH, SECTION_BYTES, bloom_bytes, bloom_bytes_per_nat, filter_bytes

# The kinds of backup filter a region may get (besides none).
FILTER_KINDS = ("bloom", "fuse")
# Column layout of a region's options: 0 = "yes", r = fuse with r-bit fingerprints, BLOOM = bloom.
BLOOM = FUSE_MAX_WIDTH + 1
WIDTHS = np.arange(1, FUSE_MAX_WIDTH + 1)
OPTION_FPRS = np.concatenate(([1.0], 2.0 ** -WIDTHS.astype(np.float64)))
# Bisection on log(lam) stops when the bracket's ratio is below 1 + this, which leaves the bound
# within about 1e-6 of its best (relative: a tenth of a byte at 100 kB). A bound from an imprecise
# lam stays valid (any lam gives one); only pruning weakens. The bracket starts at a factor
# BRACKET_STEP either side of a guess and widens by its square.
BRACKET_RATIO = 1e-6
BRACKET_STEP = 4.0
# Two totals closer than this (bytes) are equal: floating sums of the same terms in another order.
TIE_BYTES = 1e-6


@dataclass(frozen=True)
class FilterChoice:
    """One region's filter as the plan chose it: kind "yes", "no", "bloom" or "fuse"; its budget
    fpr; for "fuse" the arity and fingerprint width; the bytes it is priced at (SECTION_BYTES
    included, words rounded as built); `seed`, the first seed a fuse filter's construction tries
    (the one that works is stored with the filter)."""

    kind: str
    fpr: float
    arity: int = 0
    width: int = 0
    bytes: int = 0
    seed: int = 0


def allocate_fprs(G, H, target: float) -> np.ndarray:
    """False-positive budgets f minimising sum_i G_i log2(1 / f_i) subject to sum_i H_i f_i <= target.

    The problem is convex; its KKT solution is f_i = min(1, c G_i / H_i) with c making the
    constraint tight. On regions sorted by G/H, the clamped ones (f = 1) are a prefix; c solves
    target = sum_{clamped} H_i + c sum_{rest} G_i. Regions with G_i = 0 get f_i = 0 (no members:
    answer no, cost nothing); G_i > 0 = H_i gets f_i = 1 (no lookups to refuse). When the target
    allows every member region at f = 1, all of them get 1. The result always satisfies
    sum_i H_i f_i <= target in floating point.
    """
    G, H = check_shares(G, H)
    if not 0.0 < target <= 1.0:
        raise ValueError(f"target false-positive rate must be in (0, 1], got {target!r}")
    fprs = np.zeros(G.size)
    fprs[(G > 0) & (H == 0)] = 1.0
    priced = (G > 0) & (H > 0)
    if H[priced].sum() <= target:
        fprs[priced] = 1.0
        return fprs
    ratio = G[priced] / H[priced]
    c = _kkt_multiplier(ratio, G[priced], H[priced], target)
    while True:
        fprs[priced] = np.minimum(1.0, c * ratio)
        if expected_fpr(H, fprs) <= target:
            return fprs
        # Rounding can overshoot the tight constraint by a few ulps; step c down until it holds.
        c = np.nextafter(c, 0.0)


def expected_fpr(H, fprs) -> float:
    """sum_i H_i f_i: the false-positive rate of regions with lookup shares H and budgets f."""
    return float(np.dot(H, fprs))


def _kkt_multiplier(ratio, G, H, target: float) -> float:
    """c with sum_i min(H_i, c G_i) = target, for target < sum_i H_i (all G_i, H_i > 0).

    phi(c) = sum_i min(H_i, c G_i) is increasing and piecewise linear with a knee at c = 1/ratio_i.
    With regions in decreasing ratio order, phi at the knee of region m is the H of regions before m
    plus (1/ratio_m) times the G of regions m onwards. The regions whose knee value is <= target are
    clamped; the rest solve target = H_clamped + c G_rest.
    """
    order = np.argsort(-ratio, kind="stable")
    ratio, G, H = ratio[order], G[order], H[order]
    H_before = np.concatenate(([0.0], np.cumsum(H)[:-1]))
    G_onwards = np.cumsum(G[::-1])[::-1]
    knee_values = H_before + G_onwards / ratio
    # Exactly, the last knee value is sum(H) > target; min() keeps rounding from claiming otherwise.
    clamped = min(int(np.count_nonzero(knee_values <= target)), ratio.size - 1)
    return float((target - H_before[clamped]) / G_onwards[clamped])


def check_shares(G, H):
    """G and H as float64 arrays; ValueError unless both are 1-D, of one length, finite and >= 0."""
    G = np.asarray(G, dtype=np.float64)
    H = np.asarray(H, dtype=np.float64)
    if G.ndim != 1 or G.shape != H.shape:
        raise ValueError(f"member and non-member shares must be 1-D of one length, got {G.shape} and {H.shape}")
    if not (np.all(np.isfinite(G)) and np.all(np.isfinite(H))) or np.any(G < 0) or np.any(H < 0):
        raise ValueError("shares must be finite and >= 0")
    return G, H


# ---------------------------------------------------------------------------------------------------
# The mixed problem: kinds, integer widths and continuous Bloom budgets together.
# ---------------------------------------------------------------------------------------------------


@dataclass(frozen=True, eq=False)
class _Problem:
    """The regions that hold members: lookup shares H, Bloom coefficients a (bytes per nat), the
    discrete options' bytes (rows: regions; columns: yes, fuse r = 1..32; inf where not allowed)
    and arities, the aim and the cap."""

    H: np.ndarray
    a: np.ndarray
    discrete: np.ndarray
    arity: np.ndarray
    aim: float
    cap: float
    bloom: bool

    def bloom_fprs(self, lam: float) -> np.ndarray:
        """Each region's Bloom budget minimising a ln(1/f) + lam H f, capped (f = cap when lam H = 0)."""
        with np.errstate(divide="ignore"):
            free = np.where(self.H * lam > 0, self.a / (self.H * lam), np.inf)
        return np.minimum(free, self.cap)

    @cached_property
    def option_usage(self) -> np.ndarray:
        """H_i f of every discrete option: what it takes of the aim."""
        return self.H[:, None] * OPTION_FPRS

    def at(self, lam: float, barred: np.ndarray):
        """L(lam) of the node whose options are not `barred` (inf where barred, else 0), its slope,
        the options chosen and every option's value."""
        f_bloom = self.bloom_fprs(lam)
        values = np.empty((len(self.H), BLOOM + 1))
        np.multiply(self.option_usage, lam, out=values[:, :BLOOM])
        values[:, :BLOOM] += self.discrete
        values[:, BLOOM] = self.a * np.log(1.0 / f_bloom) + SECTION_BYTES + lam * self.H * f_bloom
        values += barred
        columns = np.argmin(values, axis=1)
        rows = np.arange(len(self.H))
        fprs = np.where(columns == BLOOM, f_bloom, OPTION_FPRS[np.minimum(columns, BLOOM - 1)])
        return float(values[rows, columns].sum() - lam * self.aim), float(self.H @ fprs - self.aim), columns, values

    def bound(self, allowed: np.ndarray, near: float = 1.0):
        """(best Lagrangian bound, its lam, the feasible side's columns); bound inf when infeasible.
        The search for lam starts around `near` (a parent node's lam is close to its children's)."""
        barred = np.where(allowed, 0.0, np.inf)
        value, slope, columns, _ = self.at(0.0, barred)
        if slope <= 0:  # the cheapest options already meet the aim: the bound is reached
            return value, 0.0, columns
        # the least each region can take of the aim (a Bloom filter: as little as it likes)
        smallest_fpr = np.where(allowed[:, BLOOM], 0.0, np.min(np.where(allowed[:, :BLOOM], OPTION_FPRS, np.inf), axis=1))
        if self.H @ smallest_fpr > self.aim:
            return math.inf, 0.0, columns
        low, high = 0.0, max(near, 1e-300) * BRACKET_STEP
        while (result := self.at(high, barred))[1] > 0:
            low, high = high, high * BRACKET_STEP**2
            if high > 1e300:
                return math.inf, 0.0, columns
        best_value, _, columns, _ = result
        while high > low * (1 + BRACKET_RATIO):
            middle = math.sqrt(low * high) if low > 0 else high / BRACKET_STEP**2
            value, slope, middle_columns, _ = self.at(middle, barred)
            if slope > 0:
                low = middle
            else:
                high, columns = middle, middle_columns
            best_value = max(best_value, value)
        return best_value, high, columns

    def exact(self, columns: np.ndarray) -> tuple[float, np.ndarray]:
        """Bytes and budgets of one class per region, the Bloom regions' budgets by capped KKT on
        what the others leave of the aim; (inf, _) when the aim cannot be met that way."""
        rows = np.arange(len(self.H))
        bloom = columns == BLOOM
        fprs = np.where(bloom, 0.0, OPTION_FPRS[np.minimum(columns, BLOOM - 1)])
        fixed = float(self.discrete[rows[~bloom], columns[~bloom]].sum())
        left = self.aim - float(self.H @ fprs)
        if not bloom.any():
            return (fixed if left >= 0 else math.inf), fprs
        H, a = self.H[bloom], self.a[bloom]
        if not (H > 0).any():
            fprs[bloom] = self.cap
        elif left <= 0:
            return math.inf, fprs
        else:
            fprs[bloom] = self.cap * allocate_fprs(a, self.cap * H, min(left, 1.0))
        return fixed + float(np.sum(a * np.log(1.0 / fprs[bloom]) + SECTION_BYTES)), fprs


def _problem(counts: np.ndarray, H: np.ndarray, aim: float, cap: float, widths, bloom: bool = True) -> _Problem:
    discrete = np.full((len(counts), BLOOM), np.inf)
    arity = np.zeros((len(counts), BLOOM), dtype=np.int64)
    if cap >= 1.0:
        discrete[:, 0] = 0.0
    for row, n in enumerate(counts):
        for width in widths:
            if OPTION_FPRS[width] > cap:
                continue
            priced = [(filter_bytes("fuse", int(n), arity=k, width=int(width)), k) for k in FUSE_ARITIES]
            discrete[row, width], arity[row, width] = min(priced)
    return _Problem(H, bloom_bytes_per_nat(counts), discrete, arity, aim, cap, bloom)


def _branch_and_bound(problem: _Problem) -> tuple[float, np.ndarray, np.ndarray]:
    """The optimal (bytes, columns, budgets) of the problem (see the module docstring)."""
    regions = len(problem.H)
    best = [math.inf, None, None]

    def explore(allowed: np.ndarray, depth: int, near: float) -> None:
        bound, lam, columns = problem.bound(allowed, near)
        if bound >= best[0] - TIE_BYTES:
            return
        cost, fprs = problem.exact(columns)
        if cost < best[0] - TIE_BYTES:
            best[:] = [cost, columns, fprs]
        if depth == regions or bound >= best[0] - TIE_BYTES:
            return
        # Reduced costs at lam: swapping one region's option for another raises the bound by the
        # difference of their values, so an option that lifts it to the best found cannot be in a
        # better choice and is dropped for the whole subtree (every region, not only the next).
        value, _, chosen, values = problem.at(lam, np.where(allowed, 0.0, np.inf))
        lifted = value - values[np.arange(regions), chosen][:, None] + values
        allowed = allowed & (lifted < best[0] - TIE_BYTES)
        # children: region `depth` fixed to each option left, the cheapest bound at lam first
        for column in np.argsort(lifted[depth], kind="stable"):
            if not allowed[depth, column]:
                break
            child = allowed.copy()
            child[depth] = False
            child[depth, column] = True
            explore(child, depth + 1, lam or 1.0)

    bloom = np.full((regions, 1), problem.bloom)
    explore(np.concatenate((np.isfinite(problem.discrete), bloom), axis=1), 0, 1.0)
    if best[1] is None:
        raise ValueError(f"no choice of filters meets the aim {problem.aim!r} (this cannot happen for an aim > 0)")
    return best[0], best[1], best[2]


def choose_filters(
    member_counts, nonmember_shares, aim: float, max_fpr: float = 1.0, kinds=FILTER_KINDS, widths=None
) -> list[FilterChoice]:
    """Per region, the filter (kind, arity, width, budget) minimising total bytes at the aim.

    member_counts: members per region; nonmember_shares: H_i (summing to at most 1); aim in (0, 1]:
    sum_i H_i f_i <= aim; max_fpr in (0, 1]: no region's budget above it (below 1, no region with
    members answers yes). `kinds`: the filter kinds allowed ("bloom", "fuse"). `widths` restricts the
    fingerprint widths tried (default 1..32; tests use fewer to enumerate every choice). Exact; see
    the module docstring.
    """
    counts = np.asarray(member_counts, dtype=np.int64)
    H = np.asarray(nonmember_shares, dtype=np.float64)
    if counts.ndim != 1 or counts.shape != H.shape or (counts < 0).any():
        raise ValueError(f"member_counts (>= 0) and nonmember_shares need one value per region, got {counts.shape} and {H.shape}")
    if not (np.isfinite(H).all() and (H >= 0).all()):
        raise ValueError("nonmember_shares must be finite and >= 0")
    if not 0.0 < aim <= 1.0:
        raise ValueError(f"the aim must be in (0, 1], got {aim!r}")
    if not 0.0 < max_fpr <= 1.0:
        raise ValueError(f"max_fpr must be in (0, 1], got {max_fpr!r}")
    if not kinds or set(kinds) - set(FILTER_KINDS):
        raise ValueError(f"filter kinds must be a non-empty selection of {FILTER_KINDS}, got {kinds!r}")
    held = counts > 0
    choices = [FilterChoice("no", 0.0) for _ in counts]
    if not held.any():
        return choices
    widths = (WIDTHS if widths is None else widths) if "fuse" in kinds else ()
    problem = _problem(counts[held], H[held], aim, max_fpr, widths, "bloom" in kinds)
    _, columns, fprs = _branch_and_bound(problem)
    arities = problem.arity[np.arange(len(columns)), np.minimum(columns, BLOOM - 1)]
    for index, n, column, fpr, arity in zip(np.flatnonzero(held), counts[held], columns, fprs, arities):
        choices[index] = _choice(int(n), int(column), float(fpr), int(arity))
    return choices


def _choice(n: int, column: int, fpr: float, arity: int) -> FilterChoice:
    if column == 0:
        return FilterChoice("yes", 1.0)
    if column == BLOOM:
        if fpr >= 1.0:
            return FilterChoice("yes", 1.0)
        return FilterChoice("bloom", fpr, bytes=bloom_bytes(n, fpr) + SECTION_BYTES)
    return FilterChoice("fuse", fpr, arity, column, filter_bytes("fuse", n, arity=arity, width=column))
