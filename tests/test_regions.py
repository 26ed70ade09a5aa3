"""Tests of the regions stage: segments, the divergence-maximising partition, the KKT budgets, the plan.

External references: the partitioned learned Bloom filter (Vaidya, Knorr, Mitzenmacher, Kraska,
"Partitioned Learned Bloom Filters", ICLR 2021) for the space formula n (log2(1/F) - D) / ln 2;
scipy.stats.entropy for the KL divergence; scipy.optimize (SLSQP) for the budget problem; brute-force
enumeration of all partitions for the dynamic programme; the Bloom filter size m = n ln(1/f) / (ln 2)^2
(Bloom, CACM 1970, standard analysis).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy import optimize, stats

from tamis.budgets import allocate_fprs
from tamis.query import region_of
from tamis.regions import (
    RegionPlan,
    RegionSettings,
    best_partition,
    best_partitions,
    kl_divergence_bits,
    plan_regions,
    segment_edges,
    segment_shares,
)
from tamis import sizing
from tamis.sizing import SECTION_BYTES, filter_bytes


def partition_divergence(g, h, cuts) -> float:
    """Divergence sum_i G_i log2(G_i / H_i) of the regions that the cut indices make of segments."""
    starts = np.concatenate(([0], np.asarray(cuts, dtype=np.int64)))
    return kl_divergence_bits(np.add.reduceat(g, starts), np.add.reduceat(h, starts))


def brute_force_best(g, h, regions: int) -> float:
    """Largest divergence over every way of cutting the segments into `regions` consecutive regions."""
    return max(
        partition_divergence(g, h, cuts)
        for cuts in itertools.combinations(range(1, len(g)), regions - 1)
    )


def random_shares(rng, segments: int, empty_share: float) -> np.ndarray:
    """Random shares summing to 1 with about `empty_share` of the segments exactly 0."""
    shares = rng.exponential(size=segments) * (rng.random(segments) >= empty_share)
    if shares.sum() == 0:
        shares[rng.integers(segments)] = 1.0
    return shares / shares.sum()


def normal_scores(rng, size: int, mean: float, scale: float = 1000.0) -> np.ndarray:
    """Integer scores from a normal distribution (a model's fixed-point scores, synthetic)."""
    return np.round(rng.normal(mean, 1.0, size) * scale).astype(np.int64)


def binomial_slack(rate: float, trials: int) -> float:
    """Four standard errors of a binomial proportion: a false alarm about once in 30,000 runs."""
    return 4.0 * math.sqrt(rate * (1.0 - rate) / trials)


# ----------------------------------------------------------------------------- region_of, segments


def test_region_of_takes_lower_boundary_inclusive_and_covers_all_scores():
    boundaries = np.array([10, 20, 30], dtype=np.int64)
    scores = np.array([-(2**62), 9, 10, 19, 20, 29, 30, 2**62], dtype=np.int64)
    assert region_of(scores, boundaries).tolist() == [0, 0, 1, 1, 2, 2, 3, 3]
    assert region_of(scores, np.array([], dtype=np.int64)).tolist() == [0] * len(scores)


def test_segment_edges_leave_no_segment_without_nonmembers():
    rng = np.random.default_rng(1)
    # Heavy ties: 50,000 scores over only 300 values, plus a spike holding a fifth of them.
    scores = np.concatenate((rng.integers(-150, 150, 40_000), np.full(10_000, 7)))
    for segments in (1, 2, 10, 100, 299, 1000, 100_000):
        edges = segment_edges(scores, segments)
        assert edges.dtype == np.int64
        assert np.all(np.diff(edges) > 0)
        assert len(edges) <= segments - 1
        counts = np.bincount(region_of(scores, edges), minlength=len(edges) + 1)
        assert np.all(counts > 0), segments


def test_segment_edges_are_quantiles_of_the_scores():
    rng = np.random.default_rng(2)
    scores = rng.integers(0, 10**9, 100_000)  # practically distinct
    edges = segment_edges(scores, 100)
    counts = np.bincount(region_of(scores, edges), minlength=len(edges) + 1)
    assert len(edges) == 99
    assert counts.min() >= 999 and counts.max() <= 1001


def test_segment_edges_of_equal_scores_give_one_segment():
    assert segment_edges(np.full(500, 42), 1000).size == 0
    assert segment_edges(np.array([5]), 10).size == 0


def test_segment_edges_reject_bad_input():
    with pytest.raises(ValueError, match="at least one"):
        segment_edges(np.array([], dtype=np.int64), 10)
    with pytest.raises(ValueError, match="integer scores"):
        segment_edges(np.array([0.5, 1.5]), 10)
    with pytest.raises(ValueError, match="segments must be"):
        segment_edges(np.array([1, 2, 3]), 0)


def test_segment_shares_count_members_and_weighted_lookups():
    edges = np.array([0, 10], dtype=np.int64)
    members = np.array([-5, 3, 4, 12, 99], dtype=np.int64)
    nonmembers = np.array([-1, -2, 5, 11], dtype=np.int64)
    weights = np.array([1.0, 3.0, 2.0, 4.0])
    g, h = segment_shares(members, nonmembers, weights, edges)
    np.testing.assert_allclose(g, [1 / 5, 2 / 5, 2 / 5])
    np.testing.assert_allclose(h, [4 / 10, 2 / 10, 4 / 10])
    g, h = segment_shares(members, nonmembers, None, edges)
    np.testing.assert_allclose(h, [2 / 4, 1 / 4, 1 / 4])
    g, _ = segment_shares(np.array([], dtype=np.int64), nonmembers, weights, edges)
    assert g.tolist() == [0.0, 0.0, 0.0]


def test_segment_shares_reject_bad_weights():
    scores = np.array([1, 2, 3])
    with pytest.raises(ValueError, match="one lookup count per non-member"):
        segment_shares(scores, scores, np.ones(2), np.array([2]))
    with pytest.raises(ValueError, match=">= 0"):
        segment_shares(scores, scores, np.array([1.0, -1.0, 1.0]), np.array([2]))
    with pytest.raises(ValueError, match="sum to 0"):
        segment_shares(scores, scores, np.zeros(3), np.array([2]))
    with pytest.raises(ValueError, match="strictly ascending"):
        segment_shares(scores, scores, None, np.array([3, 2]))


# ----------------------------------------------------------------------------- divergence


def test_kl_divergence_bits_matches_scipy_entropy():
    rng = np.random.default_rng(3)
    for _ in range(50):
        segments = int(rng.integers(1, 30))
        G = random_shares(rng, segments, empty_share=0.3)
        H = random_shares(rng, segments, empty_share=0.0)
        # scipy.stats.entropy(pk, qk, base=2) is sum pk log2(pk / qk), with 0 log 0 = 0.
        assert kl_divergence_bits(G, H) == pytest.approx(stats.entropy(G, H, base=2), rel=1e-12, abs=1e-15)


def test_kl_divergence_bits_conventions():
    assert kl_divergence_bits([0.0, 1.0], [0.5, 0.5]) == pytest.approx(1.0)
    assert kl_divergence_bits([0.0, 0.0], [0.0, 1.0]) == 0.0
    assert kl_divergence_bits([0.5, 0.5], [1.0, 0.0]) == math.inf
    # Worked example: G = (0.9, 0.1), H = (0.1, 0.9) gives 0.8 log2 9 = 2.5359 bits.
    assert kl_divergence_bits([0.9, 0.1], [0.1, 0.9]) == pytest.approx(0.8 * math.log2(9.0))


# ----------------------------------------------------------------------------- the partition


@pytest.mark.parametrize("block_columns", [None, 1, 3])
def test_best_partition_equals_brute_force(block_columns):
    rng = np.random.default_rng(4)
    for _ in range(150):
        segments = int(rng.integers(1, 13))
        g = random_shares(rng, segments, empty_share=0.3)
        h = random_shares(rng, segments, empty_share=0.2)
        partitions = best_partitions(g, h, 4, block_columns=block_columns)
        assert len(partitions) == min(4, segments)
        for regions, cuts in enumerate(partitions, start=1):
            assert cuts.dtype == np.int64 and len(cuts) == regions - 1
            assert np.all(np.diff(cuts) > 0) and np.all((cuts >= 1) & (cuts <= segments - 1))
            found = partition_divergence(g, h, cuts)
            best = brute_force_best(g, h, regions)
            assert found == best or found == pytest.approx(best, rel=1e-12, abs=1e-14)


def test_best_partition_does_not_depend_on_block_width():
    rng = np.random.default_rng(5)
    g = random_shares(rng, 300, empty_share=0.1)
    h = random_shares(rng, 300, empty_share=0.0)
    whole = best_partitions(g, h, 6)
    for block_columns in (1, 7, 64, 299):
        for a, b in zip(whole, best_partitions(g, h, 6, block_columns=block_columns)):
            assert partition_divergence(g, h, a) == pytest.approx(partition_divergence(g, h, b), rel=1e-12)


def test_best_partition_divergence_grows_with_regions():
    # Log-sum inequality: splitting a region never lowers sum G log(G/H).
    rng = np.random.default_rng(6)
    g = random_shares(rng, 200, empty_share=0.1)
    h = random_shares(rng, 200, empty_share=0.0)
    divergences = [partition_divergence(g, h, cuts) for cuts in best_partitions(g, h, 8)]
    assert all(later >= earlier - 1e-12 for earlier, later in zip(divergences, divergences[1:]))
    assert best_partition(g, h, 5).tolist() == best_partitions(g, h, 5)[-1].tolist()


def test_best_partition_with_more_regions_than_segments():
    g, h = np.array([0.2, 0.8]), np.array([0.7, 0.3])
    assert best_partition(g, h, 6).tolist() == [1]
    assert best_partition(np.array([1.0]), np.array([1.0]), 3).tolist() == []


def test_best_partition_finds_the_obvious_cut():
    g = np.array([0.0, 0.0, 0.0, 0.5, 0.5])
    h = np.array([0.3, 0.3, 0.3, 0.05, 0.05])
    assert best_partition(g, h, 2).tolist() == [3]


def test_best_partition_rejects_bad_input():
    with pytest.raises(ValueError, match="one length"):
        best_partition(np.ones(3) / 3, np.ones(2) / 2, 2)
    with pytest.raises(ValueError, match=">= 0"):
        best_partition(np.array([1.5, -0.5]), np.array([0.5, 0.5]), 2)
    with pytest.raises(ValueError, match="number of regions"):
        best_partition(np.array([1.0]), np.array([1.0]), 0)


# ----------------------------------------------------------------------------- budgets


def scipy_budgets(G, H, target):
    """Budgets from SLSQP: minimise sum G_i log2(1 / f_i) s.t. sum H_i f_i <= target, 0 < f_i <= 1.

    The variables are y = f / target (f itself leaves SLSQP badly scaled at small targets);
    y = 1 everywhere is feasible since the H_i sum to 1.
    """
    result = optimize.minimize(
        lambda y: -np.sum(G * np.log2(y * target)),
        x0=np.ones(len(G)),
        jac=lambda y: -G / (y * math.log(2.0)),
        bounds=[(1e-12, 1.0 / target)] * len(G),
        constraints=[{"type": "ineq", "fun": lambda y: 1.0 - H @ y, "jac": lambda y: -H}],
        method="SLSQP",
        options={"ftol": 1e-15, "maxiter": 2000},
    )
    assert result.success, result.message
    return result.x * target


def backup_cost(G, fprs) -> float:
    member = G > 0
    return float(-np.sum(G[member] * np.log2(fprs[member])))


def test_allocate_fprs_matches_scipy_optimize():
    rng = np.random.default_rng(7)
    clamped_cases = 0
    for _ in range(60):
        regions = int(rng.integers(2, 7))
        G = random_shares(rng, regions, empty_share=0.0)
        H = random_shares(rng, regions, empty_share=0.0)
        target = float(10 ** rng.uniform(-3, math.log10(0.9 * H.sum())))
        fprs = allocate_fprs(G, H, target)
        assert H @ fprs <= target
        reference = scipy_budgets(G, H, target)
        assert backup_cost(G, fprs) == pytest.approx(backup_cost(G, reference), rel=1e-9)
        np.testing.assert_allclose(fprs, reference, rtol=1e-6)
        clamped_cases += np.count_nonzero(fprs == 1.0) >= 2
    assert clamped_cases >= 5  # the random targets reach the clamp at f = 1 for several regions


def test_allocate_fprs_several_regions_clamp():
    G = np.array([0.4, 0.3, 0.2, 0.1])
    H = np.array([0.01, 0.02, 0.17, 0.8])
    fprs = allocate_fprs(G, H, 0.1)
    assert fprs[:2].tolist() == [1.0, 1.0]
    assert H @ fprs == pytest.approx(0.1, rel=1e-12)
    # KKT: the unclamped budgets are proportional to G / H, with c = (0.1 - 0.03) / 0.3.
    np.testing.assert_allclose(fprs[2:], (0.07 / 0.3) * G[2:] / H[2:], rtol=1e-12)
    np.testing.assert_allclose(fprs, scipy_budgets(G, H, 0.1), rtol=1e-6)


def test_allocate_fprs_special_regions():
    G = np.array([0.0, 0.5, 0.5, 0.0])
    H = np.array([0.5, 0.0, 0.3, 0.2])
    fprs = allocate_fprs(G, H, 0.01)
    assert fprs[0] == 0.0 and fprs[3] == 0.0  # no members: answer no
    assert fprs[1] == 1.0  # no lookups there: no filter needed
    assert fprs[2] == pytest.approx(0.01 / 0.3)
    # Member regions hold 30% of lookups: a 30% target lets them all answer yes.
    assert allocate_fprs(G, H, 0.3).tolist() == [0.0, 1.0, 1.0, 0.0]
    assert allocate_fprs(np.zeros(3), np.ones(3) / 3, 0.01).tolist() == [0.0, 0.0, 0.0]


def test_allocate_fprs_single_region_gets_the_target():
    assert allocate_fprs(np.array([1.0]), np.array([1.0]), 0.01).tolist() == [0.01]


def test_allocate_fprs_never_exceeds_target_in_floating_point():
    rng = np.random.default_rng(8)
    for _ in range(2000):
        regions = int(rng.integers(1, 9))
        G = random_shares(rng, regions, empty_share=0.2)
        H = random_shares(rng, regions, empty_share=0.1)
        target = float(10 ** rng.uniform(-7, 0))
        fprs = allocate_fprs(G, H, target)
        assert np.dot(H, fprs) <= target
        assert np.all((fprs > 0) == (G > 0))


def test_allocate_fprs_rejects_bad_target():
    for target in (0.0, -0.1, 1.5, math.nan):
        with pytest.raises(ValueError, match="target"):
            allocate_fprs(np.array([1.0]), np.array([1.0]), target)


# ----------------------------------------------------------------------------- the plan


def synthetic_corpus(seed: int, members: int = 20_000, nonmembers: int = 50_000):
    """Members score high, non-members low, each with a minority looking like the other side."""
    rng = np.random.default_rng(seed)
    member_scores = np.concatenate(
        (normal_scores(rng, members - members // 7, 2.5), normal_scores(rng, members // 7, 0.0))
    )
    nonmember_scores = np.concatenate(
        (normal_scores(rng, nonmembers - nonmembers // 20, -1.0), normal_scores(rng, nonmembers // 20, 1.5))
    )
    weights = rng.zipf(2.5, nonmembers).astype(np.float64)  # Zipf-like lookup counts
    return member_scores, nonmember_scores, weights


def bloom_formula_bytes(n: int, f: float) -> int:
    """Bloom 1970, standard analysis: m = n ln(1/f) / (ln 2)^2 bits, rounded up, in whole 64-bit
    words, plus the section's overhead."""
    return 8 * math.ceil(math.ceil(n * math.log(1 / f) / math.log(2) ** 2) / 64) + SECTION_BYTES


def priced_bytes(n: int, f: float, choice) -> int:
    """A region's filter bytes by its kind: a fingerprint filter's rate is 2^-r (Graf and Lemire,
    JEA 2022), so its budget is exactly that."""
    if choice.kind == "bloom":
        assert 0 < f < 1
        return bloom_formula_bytes(n, f)
    if choice.kind == "fuse":
        assert f == 2.0 ** -choice.width
        return filter_bytes("fuse", n, arity=choice.arity, width=choice.width)
    assert (choice.kind, f) in {("yes", 1.0), ("no", 0.0)}
    return 0


def assert_plan_is_consistent(plan: RegionPlan, members, nonmembers, weights, target, settings):
    regions = plan.regions
    assert 1 <= regions <= settings.max_regions
    assert plan.boundaries.dtype == np.int64 and plan.boundaries.shape == (regions - 1,)
    assert np.all(np.diff(plan.boundaries) > 0)
    assert plan.fprs.shape == (regions,) and np.all((plan.fprs >= 0) & (plan.fprs <= 1))
    # Counts, shares and FPR recomputed from the raw scores through the loader's region rule.
    counts = np.bincount(region_of(members, plan.boundaries), minlength=regions)
    assert plan.member_counts.dtype == np.int64 and plan.member_counts.tolist() == counts.tolist()
    assert plan.member_counts.sum() == len(members)
    lookups = np.bincount(region_of(nonmembers, plan.boundaries), weights=weights, minlength=regions)
    np.testing.assert_allclose(plan.nonmember_shares, lookups / lookups.sum(), rtol=1e-12)
    np.testing.assert_allclose(plan.member_shares, counts / max(1, len(members)), rtol=1e-12)
    assert plan.expected_fpr <= target
    assert plan.expected_fpr == pytest.approx(float(lookups @ plan.fprs / lookups.sum()), rel=1e-12, abs=1e-15)
    assert np.all(plan.fprs[counts == 0] == 0.0) and np.all(plan.fprs[counts > 0] > 0.0)
    bits = 8 * sum(priced_bytes(n, f, choice) for n, f, choice in zip(counts, plan.fprs, plan.filters))
    assert plan.estimated_filter_bits == bits
    assert plan.estimated_total_bits == bits + regions * settings.region_overhead_bytes * 8
    assert plan.kl_bits == pytest.approx(
        stats.entropy(plan.member_shares, plan.nonmember_shares, base=2) if len(members) else 0.0
    )
    assert not plan.fprs.flags.writeable and not plan.boundaries.flags.writeable


@pytest.mark.parametrize("target", [1e-6, 1e-3, 0.01, 0.5])
def test_plan_regions_is_consistent(target):
    members, nonmembers, weights = synthetic_corpus(9)
    settings = RegionSettings(max_regions=6, segments=300, region_overhead_bytes=64)
    plan = plan_regions(members, nonmembers, weights, target, settings)
    assert_plan_is_consistent(plan, members, nonmembers, weights, target, settings)
    assert plan.regions >= 2  # these distributions separate well: regions pay for themselves
    if target == 0.5:
        assert np.any(plan.fprs == 1.0)  # the most member-like regions need no filter at all


def test_plan_regions_saves_space_over_one_bloom_filter():
    members, nonmembers, weights = synthetic_corpus(10)
    settings = RegionSettings(max_regions=6, segments=500, region_overhead_bytes=64)
    plan = plan_regions(members, nonmembers, weights, 0.01, settings)
    single = plan_regions(members, nonmembers, weights, 0.01, RegionSettings(max_regions=1, segments=500, filter_kinds=("bloom",)))
    assert single.regions == 1 and single.fprs.tolist() == [0.01]
    assert single.estimated_filter_bits == 8 * bloom_formula_bytes(len(members), 0.01)
    assert plan.estimated_total_bits < 0.8 * single.estimated_total_bits


def test_plan_regions_chooses_regions_by_total_bits():
    members, nonmembers, weights = synthetic_corpus(11)
    totals = [
        # the divergence-maximising candidates (a local search after them may stop anywhere)
        plan_regions(members, nonmembers, weights, 0.01, RegionSettings(max_regions=k, segments=200), refine=False).estimated_total_bits
        for k in range(1, 7)
    ]
    assert all(later <= earlier for earlier, later in zip(totals, totals[1:]))
    costly = RegionSettings(max_regions=6, segments=200, region_overhead_bytes=10**9)
    assert plan_regions(members, nonmembers, weights, 0.01, costly).regions == 1


def test_plan_regions_space_formula_without_clamping(monkeypatch):
    """Vaidya, Knorr, Mitzenmacher, Kraska, "Partitioned Learned Bloom Filters", ICLR 2021: with no
    region clamped at f = 1, the optimal backup space is n (log2(1/F) - D) bits of lower bound, so
    n (log2(1/F) - D) / ln 2 Bloom bits; each region rounds its bits up, hence at most k bits more.
    The formula is for the textbook sizing: at the tiny rates this needs (no clamping), the bits
    `bloom_shape` adds for keys sharing a member's probe pair would dominate, so they are off here.
    """
    monkeypatch.setattr(sizing, "SAME_PAIR_SHARE", math.inf)
    segments = 40
    scores = np.arange(segments, dtype=np.int64) * 10
    # Known distributions over the segments: members Binomial(39, 0.6), non-members Binomial(39, 0.4).
    g = stats.binom.pmf(np.arange(segments), segments - 1, 0.6)
    h = stats.binom.pmf(np.arange(segments), segments - 1, 0.4)
    members = np.repeat(scores, np.round(g * 1e6).astype(np.int64))
    nonmember_weights = np.round(h * 1e9) + 1.0  # one lookup at least, so every segment is seen
    target = 1e-9  # small enough that c G_i / H_i stays below 1 everywhere: no clamping
    for max_regions in (1, 3, 6):
        settings = RegionSettings(max_regions=max_regions, segments=segments, region_overhead_bytes=0, filter_kinds=("bloom",))
        plan = plan_regions(members, scores, nonmember_weights, target, settings)
        assert plan.segments == segments
        assert np.all(plan.fprs < 1.0)
        divergence = stats.entropy(plan.member_shares, plan.nonmember_shares, base=2)
        formula = len(members) * (math.log2(1 / target) - divergence) / math.log(2)
        sections = plan.regions * 8 * SECTION_BYTES
        assert formula + sections <= plan.estimated_filter_bits <= formula + sections + 64 * plan.regions + 1e-6 * formula
        assert plan.regions == max_regions  # with no overhead more regions always help here


def test_plan_regions_fpr_holds_on_the_true_distribution():
    # Non-member scores are 1000 * N(0, 1) (unweighted); the plan's FPR under that distribution,
    # computed exactly from the normal CDF, must meet the target up to the sampling error of the
    # 100,000 validation keys the shares were estimated from.
    rng = np.random.default_rng(12)
    members = normal_scores(rng, 50_000, 2.0)
    validation = normal_scores(rng, 100_000, 0.0)
    target = 0.01
    plan = plan_regions(members, validation, None, target, RegionSettings(max_regions=6, segments=1000))
    # Region i holds integer scores b_{i-1} <= s < b_i, i.e. real x * 1000 in [b_{i-1} - 0.5, b_i - 0.5).
    cdf = stats.norm.cdf((np.concatenate(([-np.inf], plan.boundaries, [np.inf])) - 0.5) / 1000.0)
    true_fpr = float(np.diff(cdf) @ plan.fprs)
    assert true_fpr <= target + binomial_slack(target, len(validation))


def test_members_outside_the_validation_range_land_in_end_regions():
    rng = np.random.default_rng(13)
    nonmembers = normal_scores(rng, 10_000, 0.0)
    members = np.concatenate(
        (normal_scores(rng, 5_000, 2.0), [nonmembers.min() - 10**6, nonmembers.max() + 10**6])
    )
    plan = plan_regions(members, nonmembers, None, 0.01, RegionSettings(segments=100))
    assert plan.member_counts.sum() == len(members)
    assert region_of(members[-2:], plan.boundaries).tolist() == [0, plan.regions - 1]
    assert plan.fprs[0] > 0 and plan.fprs[-1] > 0


# ----------------------------------------------------------------------------- edge cases


def test_plan_with_no_members():
    nonmembers = np.arange(1000, dtype=np.int64)
    settings = RegionSettings(segments=50)
    plan = plan_regions(np.array([], dtype=np.int64), nonmembers, None, 0.01, settings)
    assert plan.regions == 1 and plan.fprs.tolist() == [0.0] and plan.member_counts.tolist() == [0]
    assert plan.estimated_filter_bits == 0 and plan.expected_fpr == 0.0 and plan.kl_bits == 0.0
    assert_plan_is_consistent(plan, np.array([], dtype=np.int64), nonmembers, np.ones(1000), 0.01, settings)


def test_plan_with_one_member():
    nonmembers = np.arange(1000, dtype=np.int64)
    settings = RegionSettings(segments=50)
    plan = plan_regions(np.array([500]), nonmembers, None, 0.01, settings)
    assert_plan_is_consistent(plan, np.array([500]), nonmembers, np.ones(1000), 0.01, settings)
    assert plan.member_counts.sum() == 1
    assert plan.estimated_filter_bits <= 8 * bloom_formula_bytes(1, 0.01)


def test_plan_with_all_members_in_one_segment():
    nonmembers = np.arange(1000, dtype=np.int64)
    members = np.full(3000, 995, dtype=np.int64)  # the top segment [980, +inf) of 50
    settings = RegionSettings(segments=50, region_overhead_bytes=64)
    plan = plan_regions(members, nonmembers, None, 0.01, settings)
    assert_plan_is_consistent(plan, members, nonmembers, np.ones(1000), 0.01, settings)
    member_region = int(region_of([995], plan.boundaries)[0])
    assert plan.member_counts[member_region] == 3000
    # The best region is that one segment holding 2% of lookups: it can answer at 0.01 / 0.02 = 50%.
    assert plan.nonmember_shares[member_region] == pytest.approx(0.02)
    assert plan.fprs[member_region] == pytest.approx(0.5)


def test_plan_with_all_scores_equal():
    members = np.full(100, 7, dtype=np.int64)
    nonmembers = np.full(1000, 7, dtype=np.int64)
    settings = RegionSettings(max_regions=6, segments=1000)
    plan = plan_regions(members, nonmembers, None, 0.01, settings)
    assert plan.segments == 1 and plan.regions == 1 and plan.boundaries.size == 0
    assert plan.fprs.tolist() == [0.01] and plan.kl_bits == 0.0
    assert_plan_is_consistent(plan, members, nonmembers, np.ones(1000), 0.01, settings)


def test_plan_with_more_regions_allowed_than_segments():
    rng = np.random.default_rng(14)
    nonmembers = rng.integers(0, 3, 3000)  # three distinct scores: three segments at most
    members = rng.integers(1, 4, 300)
    settings = RegionSettings(max_regions=6, segments=1000, region_overhead_bytes=0)
    plan = plan_regions(members, nonmembers, None, 0.01, settings)
    assert plan.segments == 3 and plan.regions <= 3
    assert_plan_is_consistent(plan, members, nonmembers, np.ones(3000), 0.01, settings)


def test_plan_regions_rejects_bad_input():
    scores = np.arange(10, dtype=np.int64)
    for target in (0.0, 1.0):
        with pytest.raises(ValueError, match="target_fpr"):
            plan_regions(scores, scores, None, target)
    with pytest.raises(ValueError, match="integer scores"):
        plan_regions(scores.astype(np.float64), scores, None, 0.01)
    with pytest.raises(ValueError, match="at least one"):
        plan_regions(scores, np.array([], dtype=np.int64), None, 0.01)
    with pytest.raises(ValueError, match="max_regions"):
        RegionSettings(max_regions=0)
    with pytest.raises(ValueError, match="segments"):
        RegionSettings(segments=2.5)


@pytest.mark.parametrize("target", [0.05, 0.01, 0.001])
def test_boundaries_moved_by_real_bytes_never_cost_more(target):
    # The local search starts from the divergence-maximising plan and keeps only cheaper ones, so
    # its plan never costs more, and still meets the target on the plan's shares.
    rng = np.random.default_rng(int(1 / target))
    members = (rng.normal(2.0, 1.0, 20_000) * 1000).astype(np.int64)
    nonmembers = (rng.normal(0.0, 1.0, 50_000) * 1000).astype(np.int64)
    weights = rng.integers(1, 40, nonmembers.size).astype(np.float64)
    settings = RegionSettings(segments=200)
    first = plan_regions(members, nonmembers, weights, target, settings, refine=False)
    moved = plan_regions(members, nonmembers, weights, target, settings)
    assert moved.estimated_total_bits <= first.estimated_total_bits
    assert moved.expected_fpr <= target
    assert moved.member_counts.sum() == members.size
