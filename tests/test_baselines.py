"""Tests of the baselines: the one-threshold learned filter's plan and the ideal size.

External references: the learned Bloom filter's rate F_p + (1 - F_p) f_b (M. Mitzenmacher, "A Model
for Learned Bloom Filters and Optimizing by Sandwiching", NeurIPS 2018); the Bloom filter size
m = n ln(1/f) / (ln 2)^2 and rate (1 - e^{-kn/m})^k (B. H. Bloom, CACM 1970, and the standard
analysis); brute-force search over every integer threshold for the choice of threshold.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tamis.sizing import bloom_bytes, fuse_bytes
from tamis.baselines import best_static_filter, clamped_ideal_bytes, ideal_bytes, plan_single_threshold
from tamis.bloom import hash_keys
from tamis.sizing import bloom_bits, bloom_fpr
from tamis.filters import build_filters
from tamis.query import region_of


def normal_scores(rng, size: int, mean: float, scale: float = 100.0) -> np.ndarray:
    """Integer scores from a normal distribution (synthetic fixed-point model scores)."""
    return np.round(rng.normal(mean, 1.0, size) * scale).astype(np.int64)


def brute_force_bits(members, nonmembers, weights, target: float) -> float:
    """The fewest backup bits over every integer threshold from below all scores to above them,
    each with the backup rate (F - F_p) / (1 - F_p) of the learned Bloom filter (Mitzenmacher 2018)."""
    low = min(members.min(), nonmembers.min())
    high = max(members.max(), nonmembers.max()) + 2
    best = math.inf
    for t in range(int(low), int(high) + 1):
        above = weights[nonmembers >= t].sum() / weights.sum()
        if above < target:
            best = min(best, bloom_bits(int((members < t).sum()), (target - above) / (1 - above)))
    return best


@pytest.mark.parametrize("seed", range(6))
def test_the_chosen_threshold_is_the_cheapest_of_all_integer_thresholds(seed):
    rng = np.random.default_rng(seed)
    members = normal_scores(rng, 300, 1.5, scale=20.0)
    nonmembers = normal_scores(rng, 400, -0.5, scale=20.0)
    weights = rng.zipf(2.0, nonmembers.size).astype(np.float64)
    for target in (0.01, 0.05, 0.2):
        plan = plan_single_threshold(members, nonmembers, weights, target)
        assert plan.backup_bits == brute_force_bits(members, nonmembers, weights, target)
        assert plan.members_below == int((members < plan.threshold).sum())
        assert plan.share_above == pytest.approx(weights[nonmembers >= plan.threshold].sum() / weights.sum())


def test_a_worked_example():
    # Non-members 0..9 with one lookup each, members 5..14. At target 25%: t = 8 leaves 2 of 10
    # non-members above (F_p = 0.2), so the backup gets (0.25 - 0.2) / 0.8 = 6.25% for the 3 members
    # 5, 6, 7: 3 ln(16) / (ln 2)^2 = 17.3 -> 18 bits; t = 9 (F_p = 0.1, f_b = 1/6, 4 members) needs
    # 4 ln 6 / (ln 2)^2 = 14.9 -> 15 bits; t = 10 (F_p = 0, f_b = 1/4, 5 members) 5 ln 4 / (ln 2)^2 = 14.4
    # -> 15 bits, and t = 11 and above only add members at f_b = 1/4. t = 8 or less costs more.
    members = np.arange(5, 15)
    nonmembers = np.arange(10)
    plan = plan_single_threshold(members, nonmembers, None, 0.25)
    assert plan.threshold == 9  # 15 bits, tied with t = 10: the lower threshold wins
    assert plan.members_below == 4
    assert plan.share_above == pytest.approx(0.1)
    assert plan.backup_fpr == pytest.approx(1 / 6)
    assert plan.backup_bits == 15
    assert plan.expected_fpr == pytest.approx(0.25)
    assert plan.boundaries.tolist() == [9]
    assert plan.fprs.tolist() == pytest.approx([1 / 6, 1.0])


def test_perfect_separation_needs_no_backup_and_never_beats_the_target():
    members = np.arange(100, 200)
    nonmembers = np.arange(0, 50)
    plan = plan_single_threshold(members, nonmembers, None, 0.01)
    assert (plan.threshold, plan.members_below, plan.backup_bits, plan.share_above) == (50, 0, 0, 0.0)


def test_no_separation_falls_back_to_one_bloom_filter_of_every_member():
    rng = np.random.default_rng(3)
    scores = rng.integers(0, 1000, 5000)
    plan = plan_single_threshold(scores[:2000], scores[2000:], None, 0.01)
    # never worse than the plain Bloom filter, which the threshold above every score reproduces
    assert plan.backup_bits <= bloom_bits(2000, 0.01)


def test_the_built_filter_delivers_the_planned_rate_on_the_planning_keys():
    """Built with the filters stage and answered by the loader's rule: keys at or above the
    threshold say yes, the rest ask the backup, whose rate on keys it does not hold is
    (1 - e^{-kn/m})^k (Bloom 1970): within 4 binomial standard deviations of the plan."""
    rng = np.random.default_rng(11)
    member_keys = [f"member-{i}".encode() for i in range(20_000)]
    nonmember_keys = [f"other-{i}".encode() for i in range(200_000)]
    member_scores = normal_scores(rng, len(member_keys), 2.0)
    nonmember_scores = normal_scores(rng, len(nonmember_keys), 0.0)
    plan = plan_single_threshold(member_scores, nonmember_scores, None, 0.02)
    assert 0 < plan.share_above < 0.02 and plan.members_below > 0
    seed = 5
    filters = build_filters(member_keys, region_of(member_scores, plan.boundaries), plan.fprs, seed)
    assert [f.mode for f in filters] == ["bloom", "yes"]
    backup = filters[0]
    assert backup.bits == plan.backup_bits and backup.members == plan.members_below
    below = region_of(nonmember_scores, plan.boundaries) == 0
    hits = backup.bloom(seed).query_hashes(hash_keys([k for k, b in zip(nonmember_keys, below) if b], seed))
    rate = bloom_fpr(backup.bits, backup.members, backup.hashes)
    assert abs(rate - plan.backup_fpr) < 0.1 * plan.backup_fpr  # integer probes: close to the plan
    trials = int(below.sum())
    assert abs(hits.sum() - rate * trials) <= 4 * math.sqrt(rate * (1 - rate) * trials)
    members_answer = np.ones(len(member_keys), dtype=bool)
    low = region_of(member_scores, plan.boundaries) == 0
    members_answer[low] = backup.bloom(seed).query([k for k, b in zip(member_keys, low) if b])
    assert members_answer.all()  # no false negative


def test_ideal_bytes_worked_examples():
    # n (log2(1/F) - D) / ln 2 / 8: 200,000 x (log2 100 - 4) x 1.4427 / 8 = 95,357 bytes, plus the model
    assert ideal_bytes(200_000, 0.01, 4.0, 0) == pytest.approx(95_357, abs=0.5)
    assert ideal_bytes(200_000, 0.01, 4.0, 1234) == pytest.approx(95_357 + 1234, abs=0.5)
    # with no divergence it is the optimal Bloom filter, m = n ln(1/F) / (ln 2)^2 bits (Bloom 1970)
    assert ideal_bytes(1_000_000, 0.01, 0.0, 0) == pytest.approx(bloom_bits(1_000_000, 0.01) / 8, rel=1e-6)
    # a divergence beyond log2(1/F) leaves no backup, not a negative one
    assert ideal_bytes(1000, 0.5, 3.0, 10) == 10


@pytest.mark.parametrize(
    "call, message",
    [
        (lambda: plan_single_threshold([1, 2], [0, 1], None, 0.0), "target_fpr"),
        (lambda: plan_single_threshold([1, 2], [0, 1], None, 1.0), "target_fpr"),
        (lambda: plan_single_threshold([1.5, 2.0], [0, 1], None, 0.1), "integer scores"),
        (lambda: plan_single_threshold([1, 2], [], None, 0.1), "at least one"),
        (lambda: plan_single_threshold([1, 2], [0, 1], [1.0], 0.1), "one finite lookup count"),
        (lambda: plan_single_threshold([1, 2], [0, 1], [0.0, 0.0], 0.1), "positive sum"),
        (lambda: ideal_bytes(10, 0.0, 1.0, 0), "fpr"),
    ],
)
def test_bad_input_is_refused_with_a_clear_message(call, message):
    with pytest.raises(ValueError, match=message):
        call()


def test_the_clamped_ideal_worked_example_and_its_relation_to_the_formula():
    # G = (0.5, 0.5), H = (0.995, 0.005), F = 2%: KKT budgets c G / H with c = F / sum G = 0.02 give
    # 1.005% and 200%; the second clamps at 1, so 0.995 f_0 + 0.005 = 0.02 and f_0 = 0.015 / 0.995.
    counts, shares = [100_000, 100_000], [0.995, 0.005]
    reached = 100_000 * math.log2(0.995 / 0.015) / math.log(2) / 8
    assert clamped_ideal_bytes(counts, shares, 0.02, 500) == pytest.approx(reached + 500)
    divergence = 0.5 * math.log2(0.5 / 0.995) + 0.5 * math.log2(0.5 / 0.005)
    formula = ideal_bytes(200_000, 0.02, divergence, 500)
    assert formula == pytest.approx(200_000 * (math.log2(50) - divergence) / math.log(2) / 8 + 500)
    assert formula < clamped_ideal_bytes(counts, shares, 0.02, 500)  # the formula's bits cannot be reached


@pytest.mark.parametrize("seed", range(4))
def test_without_clamping_the_clamped_ideal_is_the_formula(seed):
    """When every budget c G_i / H_i stays below 1 the KKT cost is exactly n (log2(1/F) - D) bits
    (Vaidya, Knorr, Mitzenmacher, Kraska, "Partitioned Learned Bloom Filters", ICLR 2021)."""
    rng = np.random.default_rng(seed)
    counts = rng.integers(1000, 5000, 5)
    shares = rng.dirichlet(np.ones(5))
    G = counts / counts.sum()
    target = 0.5 * float(np.min(shares / G))  # c = target, so every c G_i / H_i <= 0.5
    divergence = float(np.sum(G * np.log2(G / shares)))
    assert clamped_ideal_bytes(counts, shares, target, 0) == pytest.approx(ideal_bytes(int(counts.sum()), target, divergence, 0))


def test_best_static_filter_is_the_smaller_plain_filter():
    # At 1% a Bloom filter needs 9.585 bits a key (Bloom 1970); a binary fuse filter 7 bits times its
    # size factor, about 1.10 at 200,000 keys 4-wise (Graf and Lemire, JEA 2022): the fuse filter wins.
    best = best_static_filter(200_000, 0.01)
    assert (best.kind, best.arity, best.width, best.fpr) == ("fuse", 4, 7, 2.0**-7)
    assert best.bytes == fuse_bytes(200_000, 4, 7) < bloom_bytes(200_000, 0.01)
    assert 1.08 < best.bytes * 8 / (200_000 * 7) < 1.12
    # A rate just under a power of two costs a whole extra fingerprint bit: 0.0039 < 2^-8, so r = 9.
    assert (best_static_filter(200_000, 0.0039).kind, best_static_filter(200_000, 0.0039).width) == ("fuse", 9)
    # Three keys: the fixed segments of a fuse filter cost more than a Bloom filter's few words.
    assert best_static_filter(3, 0.01).kind == "bloom"
