"""Regions stage: speed of the exact partition, and plan size against the number of segments.

Run: .venv/bin/python benchmarks/regions_speed.py [--quick]

Table 1 times `best_partitions` (the production dynamic programme, blocked so each divergence term
is computed once for all layers) next to the straightforward O(N^2 k) programme written out below
(one vectorised max per end segment and layer), on the same shares, and checks they agree.

Table 2 plans regions on a synthetic score distribution for several segment counts N and reports
the plan's bytes and the false-positive rate it really delivers. Members score like a model's
output on banned handles: 6/7 from N(2.5, 1), 1/7 (imitators) from N(0, 1); non-members 95% from
N(-1, 1) and 5% (bot-like players) from N(1.5, 1); scores are round(10,000 x). Validation non-members
carry Zipf(2.5) lookup counts, independent of the score, so the true lookup distribution of scores is
the non-member mixture itself and the delivered FPR is computed exactly from its normal CDF.
More segments fit the score distributions more closely (fewer bytes) but estimate each
segment's lookup share from fewer keys, so the delivered FPR drifts above the planned one.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np

from tamis.sizing import bloom_bits
from tamis.regions import (
    RegionSettings,
    best_partitions,
    kl_divergence_bits,
    plan_regions,
    segment_edges,
    segment_shares,
)

# Scores are round(SCORE_SCALE * x) for the real-valued x drawn below: fine enough that even 10,000
# quantile segments of 500,000 validation scores seldom tie, so N segments are N segments.
SCORE_SCALE = 10_000.0
MEMBER_MIX = ((6 / 7, 2.5), (1 / 7, 0.0))  # (weight, mean) of unit-variance normal components
NONMEMBER_MIX = ((0.95, -1.0), (0.05, 1.5))


def mixture_scores(rng, size: int, mixture) -> np.ndarray:
    means = np.array([mean for _, mean in mixture])
    component = rng.choice(len(mixture), size=size, p=[weight for weight, _ in mixture])
    return np.round((rng.normal(size=size) + means[component]) * SCORE_SCALE).astype(np.int64)


def mixture_cdf(scores: np.ndarray, mixture) -> np.ndarray:
    """P(integer score < s) under the mixture: the real x lies below (s - 0.5) / SCORE_SCALE."""
    x = (scores - 0.5) / SCORE_SCALE
    erf = np.vectorize(math.erf)
    return sum(weight * 0.5 * (1.0 + erf((x - mean) / math.sqrt(2.0))) for weight, mean in mixture)


def true_fpr(plan) -> float:
    """The plan's FPR on future lookups, exact under the known non-member mixture."""
    edges = np.concatenate(([-np.inf], plan.boundaries.astype(np.float64), [np.inf]))
    return float(np.diff(mixture_cdf(edges, NONMEMBER_MIX)) @ plan.fprs)


def reference_partitions(g: np.ndarray, h: np.ndarray, max_regions: int) -> list[np.ndarray]:
    """The straightforward O(N^2 k) programme: best_l(b) = max_{a<b} best_{l-1}(a) + w(a, b)."""
    segments = len(g)
    G_prefix = np.concatenate(([0.0], np.cumsum(g)))
    H_prefix = np.concatenate(([0.0], np.cumsum(h)))
    best = np.full((max_regions + 1, segments + 1), -np.inf)
    best[0, 0] = 0.0
    start = np.zeros((max_regions + 1, segments + 1), dtype=np.int64)
    for layer in range(1, max_regions + 1):
        for end in range(layer, segments + 1):
            starts = np.arange(0 if layer == 1 else layer - 1, 1 if layer == 1 else end)
            G = G_prefix[end] - G_prefix[starts]
            H = H_prefix[end] - H_prefix[starts]
            with np.errstate(divide="ignore", invalid="ignore"):
                terms = np.where(G > 0, G * np.log2(G / H), 0.0)
            values = best[layer - 1, starts] + terms
            pick = int(np.argmax(values))
            best[layer, end], start[layer, end] = values[pick], starts[pick]
    partitions = []
    for regions in range(1, max_regions + 1):
        cuts, end = [], segments
        for layer in range(regions, 1, -1):
            end = int(start[layer, end])
            cuts.append(end)
        partitions.append(np.array(cuts[::-1], dtype=np.int64))
    return partitions


def partition_divergence(g, h, cuts) -> float:
    starts = np.concatenate(([0], cuts))
    return kl_divergence_bits(np.add.reduceat(g, starts), np.add.reduceat(h, starts))


def timed(function, *args):
    began = time.perf_counter()
    result = function(*args)
    return result, time.perf_counter() - began


def speed_table(members, nonmembers, weights, sizes, max_regions: int) -> None:
    print(f"Table 1. Exact partition, k = {max_regions}: production vs straightforward reference")
    print(f"{'N':>7} {'segments':>9} {'production s':>13} {'reference s':>12} {'max |dD| bits':>14}")
    for size in sizes:
        edges = segment_edges(nonmembers, size)
        g, h = segment_shares(members, nonmembers, weights, edges)
        fast, fast_seconds = timed(best_partitions, g, h, max_regions)
        slow, slow_seconds = timed(reference_partitions, g, h, max_regions)
        gap = max(
            abs(partition_divergence(g, h, a) - partition_divergence(g, h, b)) for a, b in zip(fast, slow)
        )
        print(f"{size:>7} {len(g):>9} {fast_seconds:>13.3f} {slow_seconds:>12.3f} {gap:>14.2e}")


def size_table(rng, sizes, targets, seeds: int, member_count: int, nonmember_count: int) -> None:
    print()
    print(
        f"Table 2. Plan size against N: {member_count:,} members, {nonmember_count:,} validation "
        f"non-members (Zipf lookups), max 6 regions, 64 B per region; {seeds} seeds, mean (worst FPR)"
    )
    print(
        f"{'target':>7} {'N':>6} {'segs':>6} {'k':>4} {'plan bytes':>11} {'bits/member':>12} {'vs Bloom':>9} "
        f"{'KL bits':>8} {'planned FPR':>12} {'true FPR':>10} {'worst true/target':>18} {'plan s':>7}"
    )
    corpora = [
        (
            mixture_scores(rng, member_count, MEMBER_MIX),
            mixture_scores(rng, nonmember_count, NONMEMBER_MIX),
            rng.zipf(2.5, nonmember_count).astype(np.float64),
        )
        for _ in range(seeds)
    ]
    for target in targets:
        bloom_bytes = bloom_bits(member_count, target) / 8
        for size in sizes:
            settings = RegionSettings(max_regions=6, segments=size, region_overhead_bytes=64)
            rows = []
            for members, nonmembers, weights in corpora:
                plan, seconds = timed(plan_regions, members, nonmembers, weights, target, settings)
                rows.append((plan, seconds, true_fpr(plan)))
            plan_bytes = np.mean([plan.estimated_total_bits / 8 for plan, _, _ in rows])
            print(
                f"{target:>7g} {size:>6} {np.mean([p.segments for p, _, _ in rows]):>6.0f} "
                f"{np.mean([p.regions for p, _, _ in rows]):>4.1f} {plan_bytes:>11,.0f} "
                f"{plan_bytes * 8 / member_count:>12.3f} {plan_bytes / bloom_bytes:>9.3f} "
                f"{np.mean([p.kl_bits for p, _, _ in rows]):>8.3f} "
                f"{np.mean([p.expected_fpr for p, _, _ in rows]):>12.3e} "
                f"{np.mean([fpr for _, _, fpr in rows]):>10.3e} "
                f"{max(fpr for _, _, fpr in rows) / target:>18.3f} "
                f"{np.mean([s for _, s, _ in rows]):>7.2f}"
            )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, one seed (a smoke run)")
    args = parser.parse_args()
    rng = np.random.default_rng(20261201)
    members = mixture_scores(rng, 200_000, MEMBER_MIX)
    nonmembers = mixture_scores(rng, 500_000, NONMEMBER_MIX)
    weights = rng.zipf(2.5, nonmembers.size).astype(np.float64)
    speed_table(members, nonmembers, weights, (1000,) if args.quick else (1000, 10000), max_regions=8)
    sizes = (30, 100, 300, 1000) if args.quick else (30, 100, 200, 500, 1000, 2000, 5000, 10000)
    size_table(rng, sizes, (0.01, 0.001), 1 if args.quick else 3, 200_000, 500_000)


if __name__ == "__main__":
    main()
