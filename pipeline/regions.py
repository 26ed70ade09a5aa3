"""Regions: split the score range, group it into regions, give each region a false-positive budget.

This is the partitioned learned Bloom filter (Vaidya, Knorr, Mitzenmacher, Kraska, "Partitioned
Learned Bloom Filters", ICLR 2021), in four pure steps:

1. `segment_edges`: cut the integer score range into N small segments at quantiles of the
   validation non-member scores, so that every segment holds at least one validation non-member.
2. `segment_shares`: per segment j, g_j = share of members and h_j = share of non-member lookups
   (weighted by lookup counts) whose score falls there.
3. `best_partition`: group consecutive segments into k regions maximising the KL divergence
   D = sum_i G_i log2(G_i / H_i) between the region-level member and non-member shares, by an exact
   dynamic programme over segments.
4. `tamis.budgets.choose_filters`: for fixed regions, each region's filter kind (none, Bloom, or
   a binary fuse filter of an integer fingerprint width) and budget f_i, minimising the filters'
   real bytes subject to sum_i H_i f_i <= F (and f_i <= max_region_fpr), exactly.

With Bloom filters only and no clamping (every f_i < 1) the budgets are f_i = c G_i / H_i (KKT,
`tamis.budgets.allocate_fprs`) and the backup space is n (log2(1/F) - D) bits of lower bound, times
the Bloom constant 1/ln 2: every bit of divergence saves one bit per member; a fingerprint filter
pays a smaller constant (about 1.08 to 1.25) on a whole number of bits per member instead.
`plan_regions` runs the four steps for every k up to `RegionSettings.max_regions` and keeps the k
with the fewest total bytes (backup filters plus a fixed cost per region).

Boundaries are integer scores: region i holds the scores s with boundaries[i-1] <= s < boundaries[i];
the first region reaches down to -inf and the last up to +inf, so every key lands in some region,
whatever its score. `tamis.query.region_of` is that rule, in the query path a service runs.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from tamis.budgets import FILTER_KINDS, FilterChoice, check_shares, choose_filters, expected_fpr
from tamis.query import region_of

# The dynamic programme sweeps the (start, end) table in blocks of end columns. A block holds about
# this many cells (16 MiB per float64 temporary), which keeps memory flat at N = 10,000 segments
# while each numpy call still works on millions of cells. The answer does not depend on it.
DP_BLOCK_CELLS = 1 << 21
# The local search on the boundaries (`_moved_cuts`): the steps, in segments, a cut is moved by,
# and the most plans it prices (each one `choose_filters`, about a millisecond for 6 regions).
CUT_STEPS = (32, 8, 2, 1)
REFINE_PLANS = 400


@dataclass(frozen=True)
class RegionSettings:
    """How the score range is cut and grouped.

    max_regions: the largest number of regions tried; k around 4 to 6 captures nearly all the
        divergence on typical score distributions, and each region costs `region_overhead_bytes`.
    segments: how many quantile segments of the validation non-member scores the regions are built
        from (fewer remain when scores tie). More segments follow the score distributions more
        closely but estimate each non-member share from fewer keys. Measured by
        `benchmarks/regions_speed.py` (200,000 members, 500,000 validation keys): at 1,000 the plan
        is within 0.2% of the bytes at 10,000 and 1% smaller than at 200, and takes about 0.1 s.
    region_overhead_bytes: the fixed artifact cost of one region, charged when choosing k: its
        boundary (8 bytes) and its header entry (mode, members, budget: about 40 bytes); 64 is a
        round estimate. A region's filter section is priced with the filter (`tamis.sizing`).
    max_region_fpr: the largest budget any region may get. A region at f = 1 answers yes for every
        key that scores there, so keys unlike the validation sample that score like members pass
        at that rate; a cap below 1 gives every region with members a filter (it costs bytes:
        README, "Capping a region's rate").
    filter_kinds: the backup filter kinds a region may get: "bloom" (any rate) and "fuse" (binary
        fuse filters, rates 2^-r); the plan picks per region whichever costs fewer bytes.
    """

    max_regions: int = 6
    segments: int = 1000
    region_overhead_bytes: int = 64
    max_region_fpr: float = 1.0
    filter_kinds: tuple[str, ...] = FILTER_KINDS

    def __post_init__(self) -> None:
        for name, low in (("max_regions", 1), ("segments", 1), ("region_overhead_bytes", 0)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < low:
                raise ValueError(f"RegionSettings.{name} must be an integer >= {low}, got {value!r}")
        if not self.filter_kinds or set(self.filter_kinds) - set(FILTER_KINDS):
            raise ValueError(f"RegionSettings.filter_kinds must be a non-empty selection of {FILTER_KINDS}, got {self.filter_kinds!r}")
        cap = self.max_region_fpr
        if isinstance(cap, bool) or not isinstance(cap, (int, float)) or not 0.0 < cap <= 1.0:
            raise ValueError(f"RegionSettings.max_region_fpr must be a rate in (0, 1], got {cap!r}")


@dataclass(frozen=True, eq=False)
class RegionPlan:
    """The chosen regions and their false-positive budgets (arrays are read-only).

    boundaries: int64 (k-1,), ascending integer scores; region i holds boundaries[i-1] <= s <
        boundaries[i], the first from -inf, the last to +inf.
    fprs: float64 (k,), each region's false-positive budget f_i in [0, 1]: 1 = no filter (answers
        yes), 0 = no members there (answers no), otherwise a backup filter at that rate.
    filters: (k,) `tamis.budgets.FilterChoice`, each region's filter kind ("yes", "no", "bloom",
        "fuse"), fingerprint width and arity, budget and priced bytes.
    member_counts: int64 (k,), members per region (they sum to all members).
    member_shares: float64 (k,), G_i = member_counts / members (all 0 when there are no members).
    nonmember_shares: float64 (k,), H_i = share of validation non-member lookups in region i.
    kl_bits: D = sum_i G_i log2(G_i / H_i), the divergence the regions achieve, in bits.
    estimated_filter_bits: 8 x the bytes of the regions' filters as priced (`FilterChoice.bytes`:
        words as built plus each section's overhead).
    estimated_total_bits: estimated_filter_bits plus k region overheads, the quantity k minimises.
    expected_fpr: sum_i H_i f_i, the false-positive rate predicted on validation lookups, <= target.
    segments: how many segments the regions were grouped from (after ties collapsed some).
    """

    boundaries: np.ndarray
    fprs: np.ndarray
    filters: tuple[FilterChoice, ...]
    member_counts: np.ndarray
    member_shares: np.ndarray
    nonmember_shares: np.ndarray
    kl_bits: float
    estimated_filter_bits: int
    estimated_total_bits: int
    expected_fpr: float
    segments: int

    @property
    def regions(self) -> int:
        return len(self.fprs)


def segment_edges(nonmember_scores, segments: int) -> np.ndarray:
    """Integer segment edges (int64, ascending, at most segments - 1) at non-member score quantiles.

    Edge j is the validation score of rank floor(j M / segments) (M scores sorted); duplicates are
    dropped, and so is an edge equal to the smallest score. Each segment [e_{j-1}, e_j) then holds
    the non-member whose score is e_{j-1} (and the first segment holds the smallest score), so no
    segment is empty of non-members. Ties collapse segments; all-equal scores give no edge at all
    (one segment).
    """
    scores = _integer_scores(nonmember_scores, "nonmember_scores")
    if scores.size == 0:
        raise ValueError("segment_edges needs at least one validation non-member score, got none")
    if isinstance(segments, bool) or not isinstance(segments, (int, np.integer)) or segments < 1:
        raise ValueError(f"segments must be an integer >= 1, got {segments!r}")
    ordered = np.sort(scores)
    ranks = np.arange(1, segments, dtype=np.int64) * ordered.size // segments
    edges = np.unique(ordered[ranks])
    return edges[edges > ordered[0]]


def segment_shares(member_scores, nonmember_scores, nonmember_weights, edges):
    """Shares (g, h) per segment: of members, and of non-member lookups weighted by their counts.

    Segment j holds the scores s with edges[j-1] <= s < edges[j] (first from -inf, last to +inf),
    so there are len(edges) + 1 segments and each share vector sums to 1. With no members g is all
    zero. `nonmember_weights` is the lookup count of each non-member (None: one lookup each).
    """
    member_counts, lookup_weights = _segment_totals(
        member_scores, nonmember_scores, nonmember_weights, edges
    )
    members = member_counts.sum()
    g = member_counts / members if members else np.zeros(member_counts.size)
    return g, lookup_weights / lookup_weights.sum()


def kl_divergence_bits(G, H) -> float:
    """D = sum_i G_i log2(G_i / H_i) in bits, with 0 log 0 = 0 (and +inf where G_i > 0 = H_i)."""
    G, H = check_shares(G, H)
    return float(_divergence_terms(G, H).sum())


def best_partition(g, h, k: int) -> np.ndarray:
    """Cut indices of the min(k, N) consecutive regions of N segments that maximise the divergence.

    Returns c_1 < ... < c_{k-1} in 1..N-1: region i holds segments c_{i-1} <= j < c_i (c_0 = 0,
    c_k = N). Exact; see `best_partitions`.
    """
    return best_partitions(g, h, k)[-1]


def best_partitions(g, h, max_regions: int, *, block_columns: int | None = None) -> list[np.ndarray]:
    """For each k = 1..min(max_regions, N), the cut indices maximising sum_i G_i log2(G_i / H_i).

    Dynamic programme over prefixes: with w(a, b) the divergence term of one region made of
    segments a..b-1, best_l(b) = max_{a < b} best_{l-1}(a) + w(a, b) and best_0 is 0 at b = 0 only.
    That is exact and O(N^2 k). The table w is swept in blocks of end columns b; each block is
    computed once and serves every layer l (a cell w(a, b) needs best_{l-1}(a) with a < b, which the
    same block has already produced for a inside it), so the logarithms cost O(N^2) in all.
    Ties go to the smallest start, so the answer is deterministic. Splitting a region never lowers
    the divergence (log-sum inequality), so each k uses exactly k regions when N >= k.
    `block_columns` overrides the block width (a memory knob; the result does not depend on it).
    """
    g, h = check_shares(g, h)
    if g.size == 0:
        raise ValueError("best_partitions needs at least one segment, got empty share vectors")
    if isinstance(max_regions, bool) or not isinstance(max_regions, (int, np.integer)) or max_regions < 1:
        raise ValueError(f"the number of regions must be an integer >= 1, got {max_regions!r}")
    if block_columns is not None and (not isinstance(block_columns, (int, np.integer)) or block_columns < 1):
        raise ValueError(f"block_columns must be an integer >= 1 or None, got {block_columns!r}")
    segments = g.size
    layers = min(int(max_regions), segments)
    width = int(block_columns or max(1, DP_BLOCK_CELLS // (segments + 1)))
    # Cumulative shares by sequential addition: non-decreasing, and exactly flat over zero shares,
    # so a region's sums G, H are never negative and exactly 0 where all its shares are.
    G_prefix = np.concatenate(([0.0], np.cumsum(g)))
    H_prefix = np.concatenate(([0.0], np.cumsum(h)))
    best = np.full((layers + 1, segments + 1), -np.inf)
    best[0, 0] = 0.0
    start = np.zeros((layers + 1, segments + 1), dtype=np.int64)
    for first in range(1, segments + 1, width):
        stop = min(first + width, segments + 1)
        _sweep_block(best, start, G_prefix, H_prefix, first, stop)
    return [_backtrack(start, regions, segments) for regions in range(1, layers + 1)]


def plan_regions(
    member_scores,
    nonmember_scores,
    nonmember_weights,
    target_fpr: float,
    settings: RegionSettings | None = None,
    refine: bool = True,
) -> RegionPlan:
    """Choose regions and budgets for the members' scores at the target false-positive rate.

    Segments come from quantiles of the validation non-member scores; for every k up to
    settings.max_regions the exact divergence-maximising partition gets its cheapest filters
    (`choose_filters`), and its cost is their bytes + k * region_overhead_bytes. The k
    with the least cost wins (the smaller k on a tie); with `refine`, a local search then moves its
    boundaries while the real bytes fall (`_moved_cuts`; the model stage prices its checkpoints
    without it). `nonmember_weights` are lookup counts (None: one lookup each); the non-members
    must be validation keys the model did not train on.
    """
    settings = settings or RegionSettings()
    if not 0.0 < target_fpr < 1.0:
        raise ValueError(f"target_fpr must be in (0, 1), got {target_fpr!r}")
    edges = segment_edges(nonmember_scores, settings.segments)
    member_counts, lookup_weights = _segment_totals(
        member_scores, nonmember_scores, nonmember_weights, edges
    )
    members = int(member_counts.sum())
    g = member_counts / members if members else np.zeros(member_counts.size)
    h = lookup_weights / lookup_weights.sum()
    def plan_for(cuts: np.ndarray) -> RegionPlan:
        return _plan_for_cuts(cuts, edges, member_counts, lookup_weights, target_fpr, settings)

    candidates = [(plan_for(cuts), cuts) for cuts in best_partitions(g, h, settings.max_regions)]
    plan, cuts = min(candidates, key=lambda candidate: candidate[0].estimated_total_bits)
    return _moved_cuts(plan, cuts, plan_for, len(edges) + 1) if refine else plan


def _moved_cuts(plan: RegionPlan, cuts: np.ndarray, plan_for, segments: int) -> RegionPlan:
    """The plan after a local search on its boundaries priced by the filters' real bytes.

    The divergence-maximising cuts are the best only for Bloom-shaped costs; the filters built
    (fuse widths 2^-r, whole words, sections) move the best cuts a little. From the given cuts,
    try moving one cut by each of CUT_STEPS segments either way and dropping one cut; take the
    first move that lowers the total bytes and start again, until no move does or REFINE_PLANS
    plans were priced. Only a cheaper plan replaces the current one, so the result never costs
    more than the plan it started from.
    """
    priced = 0
    improved = True
    while improved and priced < REFINE_PLANS:
        improved = False
        for moved in _neighbours(cuts, segments):
            candidate = plan_for(moved)
            priced += 1
            if candidate.estimated_total_bits < plan.estimated_total_bits:
                plan, cuts, improved = candidate, moved, True
                break
            if priced >= REFINE_PLANS:
                break
    return plan


def _neighbours(cuts: np.ndarray, segments: int):
    """Cut arrays one move away: one cut moved by a CUT_STEPS step (staying strictly between its
    neighbours), or one cut dropped."""
    bounds = np.concatenate(([0], cuts, [segments]))
    for index in range(len(cuts)):
        for step in CUT_STEPS:
            for moved in (cuts[index] - step, cuts[index] + step):
                if bounds[index] < moved < bounds[index + 2]:
                    yield np.concatenate((cuts[:index], [moved], cuts[index + 1 :]))
    for index in range(len(cuts)):
        yield np.delete(cuts, index)


def _plan_for_cuts(cuts, edges, member_counts, lookup_weights, target_fpr, settings) -> RegionPlan:
    """The plan for one partition of the segments: region shares, filters, budgets and their cost."""
    starts = np.concatenate(([0], cuts))
    counts = np.add.reduceat(member_counts, starts)
    members = int(counts.sum())
    G = counts / members if members else np.zeros(counts.size)
    H = np.add.reduceat(lookup_weights, starts) / lookup_weights.sum()
    filters = tuple(choose_filters(counts, H, target_fpr, settings.max_region_fpr, settings.filter_kinds))
    fprs = np.array([choice.fpr for choice in filters])
    filter_bits = 8 * sum(choice.bytes for choice in filters)
    overhead_bits = len(fprs) * settings.region_overhead_bytes * 8
    return RegionPlan(
        boundaries=_read_only(edges[cuts - 1]),
        fprs=_read_only(fprs),
        filters=filters,
        member_counts=_read_only(counts.astype(np.int64)),
        member_shares=_read_only(G),
        nonmember_shares=_read_only(H),
        kl_bits=kl_divergence_bits(G, H),
        estimated_filter_bits=int(filter_bits),
        estimated_total_bits=int(filter_bits + overhead_bits),
        expected_fpr=expected_fpr(H, fprs),
        segments=len(edges) + 1,
    )


def _sweep_block(best, start, G_prefix, H_prefix, first: int, stop: int) -> None:
    """Fill best[l, first:stop] and start[l, first:stop] for every layer l, in place.

    terms[b - first, a] = w(a, b) for end prefixes b in [first, stop) and start prefixes a < stop - 1.
    One region always starts at a = 0; layer l >= 2 starts at a >= l - 1, where best_{l-1} is reached.
    Cells with a >= b are not regions and are excluded after adding best_{l-1}(a) (excluding them by
    -inf in the table itself could meet a +inf and give nan).
    """
    starts_end = stop - 1
    terms = _divergence_terms(
        G_prefix[first:stop, None] - G_prefix[None, :starts_end],
        H_prefix[first:stop, None] - H_prefix[None, :starts_end],
    )
    ends = np.arange(first, stop)
    not_region = np.arange(first, starts_end)[None, :] >= ends[:, None]
    rows = np.arange(stop - first)
    best[1, first:stop] = terms[:, 0]  # one region: it starts at prefix 0
    for layer in range(2, best.shape[0]):
        lowest = layer - 1  # fewer than l-1 segments cannot hold l-1 regions
        if lowest >= starts_end:
            break
        scores = terms[:, lowest:] + best[layer - 1, lowest:starts_end]
        overlap = max(lowest, first)
        np.copyto(scores[:, overlap - lowest:], -np.inf, where=not_region[:, overlap - first:])
        choice = np.argmax(scores, axis=1)
        best[layer, first:stop] = scores[rows, choice]
        start[layer, first:stop] = choice + lowest


def _backtrack(start, regions: int, segments: int) -> np.ndarray:
    """Cut indices of the best partition into `regions` regions, read back from the start table."""
    cuts = []
    end = segments
    for layer in range(regions, 1, -1):
        end = int(start[layer, end])
        cuts.append(end)
    return np.array(cuts[::-1], dtype=np.int64)


def _divergence_terms(G: np.ndarray, H: np.ndarray) -> np.ndarray:
    """Elementwise G log2(G / H), with 0 where G = 0 (0 log 0 = 0) and +inf where G > 0 = H."""
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = G / H
        np.log2(terms, out=terms)
        terms *= G
    terms[G == 0] = 0.0
    return terms


def _segment_totals(member_scores, nonmember_scores, nonmember_weights, edges):
    """Per segment: member count (int64) and summed non-member lookup weight (float64)."""
    members = _integer_scores(member_scores, "member_scores")
    nonmembers = _integer_scores(nonmember_scores, "nonmember_scores")
    edges = _integer_scores(edges, "edges")
    if np.any(np.diff(edges) <= 0):
        raise ValueError("edges must be strictly ascending integer scores (use segment_edges)")
    if nonmembers.size == 0:
        raise ValueError("need at least one validation non-member score to estimate lookup shares")
    weights = _lookup_weights(nonmember_weights, nonmembers.size)
    segments = edges.size + 1
    member_counts = np.bincount(region_of(members, edges), minlength=segments).astype(np.int64)
    lookup_weights = np.bincount(region_of(nonmembers, edges), weights=weights, minlength=segments)
    return member_counts, lookup_weights


def _lookup_weights(weights, count: int) -> np.ndarray:
    if weights is None:
        return np.ones(count)
    weights = np.asarray(weights, dtype=np.float64)
    if weights.shape != (count,):
        raise ValueError(
            f"nonmember_weights must have one lookup count per non-member score: "
            f"shape {weights.shape}, expected ({count},)"
        )
    if not np.all(np.isfinite(weights)) or np.any(weights < 0):
        raise ValueError("nonmember_weights must be finite and >= 0 (lookup counts)")
    if weights.sum() <= 0:
        raise ValueError("nonmember_weights sum to 0: at least one non-member lookup is needed")
    return weights


def _integer_scores(scores, name: str) -> np.ndarray:
    array = np.asarray(scores)
    if array.ndim != 1:
        raise ValueError(f"{name} must be a 1-D array of integer scores, got shape {array.shape}")
    if array.size and not np.issubdtype(array.dtype, np.integer):
        raise ValueError(
            f"{name} must hold integer scores (the compiled model's output), got dtype {array.dtype}"
        )
    return array.astype(np.int64, copy=False)


def _read_only(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array
