"""The choice of filter kind, width and budget per region: exact against brute-force enumeration."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from scipy.optimize import minimize

from tamis.budgets import BLOOM, _branch_and_bound, _problem, allocate_fprs, choose_filters
from tamis.sizing import LN2, SECTION_BYTES, filter_bytes

SMALL_WIDTHS = np.arange(1, 9)


def brute_force(problem) -> float:
    """The least bytes over every class of every region (yes, each fuse width, bloom), the Bloom
    budgets of each by the capped KKT rule (`exact`)."""
    columns = [0, *SMALL_WIDTHS.tolist(), BLOOM]
    return min(problem.exact(np.array(choice))[0] for choice in itertools.product(columns, repeat=len(problem.H)))


def random_instance(rng):
    regions = int(rng.integers(1, 4))
    counts = rng.integers(1, 60_000, regions)
    H = rng.dirichlet(np.ones(regions) * 0.5)
    aim = float(10 ** rng.uniform(-3.5, -0.5))
    cap = float(rng.choice([1.0, 0.5, 0.1, 0.05]))
    return counts, H, aim, cap


@pytest.mark.parametrize("seed", range(40))
def test_branch_and_bound_matches_brute_force(seed):
    counts, H, aim, cap = random_instance(np.random.default_rng(seed))
    problem = _problem(counts, H, aim, cap, SMALL_WIDTHS)
    expected = brute_force(problem)
    cost, columns, fprs = _branch_and_bound(problem)
    assert cost == pytest.approx(expected, rel=1e-9)
    assert float(H @ fprs) <= aim * (1 + 1e-12)
    assert (fprs <= cap).all()


def test_bloom_part_matches_scipy():
    # The exact Bloom budgets of a fixed choice against a general-purpose solver (scipy SLSQP):
    # three Bloom regions, no cap, aim 1%.
    counts = np.array([50_000, 20_000, 5_000])
    H = np.array([0.02, 0.18, 0.8])
    problem = _problem(counts, H, 0.01, 1.0, SMALL_WIDTHS)
    cost, fprs = problem.exact(np.array([BLOOM, BLOOM, BLOOM]))
    a = counts / (8 * LN2 * LN2)
    result = minimize(
        lambda x: float(np.sum(a * -x)), np.log(np.full(3, 0.01)), method="SLSQP",
        constraints=[{"type": "ineq", "fun": lambda x: 0.01 - float(H @ np.exp(x))}],
        bounds=[(-40, 0)] * 3, options={"ftol": 1e-12, "maxiter": 500},
    )
    assert cost == pytest.approx(float(np.sum(a * -result.x)) + 3 * SECTION_BYTES, rel=1e-6)


def test_large_regions_take_fingerprint_filters_of_the_bound_width():
    # One region of a million members at 1/256: an 8-bit fuse filter (f exactly 2^-8) beats a Bloom
    # filter at the same rate by about 1.44 / 1.08 (Graf and Lemire, JEA 2022, 4-wise at 10^6 keys).
    (choice,) = choose_filters([1_000_000], [1.0], 2.0 ** -8)
    assert (choice.kind, choice.width, choice.arity, choice.fpr) == ("fuse", 8, 4, 2.0 ** -8)
    assert choice.bytes == filter_bytes("fuse", 1_000_000, arity=4, width=8)


def test_a_region_without_lookups_answers_yes_unless_capped():
    choices = choose_filters([1000, 1000], [0.0, 1.0], 0.01)
    assert choices[0].kind == "yes"
    capped = choose_filters([1000, 1000], [0.0, 1.0], 0.01, max_fpr=0.1)
    assert capped[0].fpr <= 0.1 and capped[0].kind != "yes"


def test_regions_without_members_answer_no_and_cost_nothing():
    choices = choose_filters([0, 500, 0], [0.5, 0.25, 0.25], 0.01)
    assert [c.kind for c in choices][::2] == ["no", "no"]
    assert choices[1].fpr <= 0.04


def test_cap_holds_on_every_region_and_costs_bytes():
    counts, H = [100_000, 50_000, 10_000], [0.001, 0.01, 0.989]
    free = choose_filters(counts, H, 0.01)
    capped = choose_filters(counts, H, 0.01, max_fpr=0.05)
    assert all(c.fpr <= 0.05 for c in capped)
    assert sum(c.bytes for c in capped) >= sum(c.bytes for c in free)
    assert any(c.fpr > 0.05 for c in free)


def test_bad_inputs_are_refused():
    with pytest.raises(ValueError, match="aim"):
        choose_filters([1], [1.0], 0.0)
    with pytest.raises(ValueError, match="max_fpr"):
        choose_filters([1], [1.0], 0.01, max_fpr=0.0)
    with pytest.raises(ValueError, match="one value per region"):
        choose_filters([1, 2], [1.0], 0.01)


def test_allocate_fprs_is_the_uncapped_bloom_rule():
    G, H = np.array([0.5, 0.5]), np.array([0.1, 0.9])
    fprs = allocate_fprs(G, H, 0.01)
    assert float(H @ fprs) == pytest.approx(0.01)
    assert fprs[0] / fprs[1] == pytest.approx(9.0)
