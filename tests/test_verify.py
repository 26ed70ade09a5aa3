"""Verify stage: every answer path checked on every member, and the statistics against reference
formulas and scipy."""

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from golden_build import write_fixed_corpus
from tamis.config import GateSettings
from tamis.corpus import KeySet
from tamis.loader import MembershipFilter, answer_paths, open_filter
from tamis.verify import (
    aim_fpr,
    check_filter,
    clopper_pearson_upper,
    effective_sample_size,
    gate_checks,
    measure_fpr,
    needed_heldout,
    refusal_reasons,
)

# The format's reference artifact holds the members of golden_build's fixed corpus.
REFERENCE_ARTIFACT = Path(__file__).parent / "data" / "format-1.0.tamis"


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    members_path, others_path = write_fixed_corpus(tmp_path_factory.mktemp("fixed"))
    members = members_path.read_bytes().splitlines()
    others = others_path.read_bytes().splitlines()
    return {"members": members, "heldout": KeySet(others, np.ones(len(others), dtype=np.int64))}


def _verdict(members, heldout) -> tuple:
    checked = check_filter(open_filter(REFERENCE_ARTIFACT), members, heldout, False, 0.95)
    reasons = refusal_reasons(gate_checks(checked, target=0.5, total_bytes=1, members=len(members),
                                          settings=GateSettings(), baseline=None))
    return checked, reasons


def test_every_member_and_a_sample_of_non_members_go_through_every_answer_path(reference):
    checked, reasons = _verdict(reference["members"], reference["heldout"])
    assert checked.false_negatives == 0 and reasons == []
    assert checked.paths.paths == answer_paths() and len(answer_paths()) >= 2
    assert checked.paths.members == len(reference["members"])
    assert checked.paths.nonmembers == len(reference["heldout"].keys)  # below the sample cap: all of them
    assert checked.paths.members_differing == checked.paths.nonmembers_differing == 0


def test_a_single_key_path_that_misses_a_member_is_refused(reference, monkeypatch):
    # the batch path is right, the single-key path answers one member "no": the gate must see it
    missed = reference["members"][17]
    right = MembershipFilter.contains
    monkeypatch.setattr(MembershipFilter, "contains", lambda self, key: key != missed and right(self, key))
    checked, reasons = _verdict(reference["members"], reference["heldout"])
    assert checked.false_negatives == 1 and checked.paths.members_differing == 1
    assert [r.split(":")[0] for r in reasons] == ["false_negatives", "answer_paths"]


def test_paths_that_differ_on_a_non_member_are_refused(reference, monkeypatch):
    loaded = open_filter(REFERENCE_ARTIFACT)
    said_no = [k for k, a in zip(reference["heldout"].keys, loaded.contains_many(reference["heldout"].keys)) if not a]
    odd = said_no[3]
    right = MembershipFilter.contains
    monkeypatch.setattr(MembershipFilter, "contains", lambda self, key: key == odd or right(self, key))
    checked, reasons = _verdict(reference["members"], reference["heldout"])
    assert checked.false_negatives == 0 and checked.paths.nonmembers_differing == 1
    assert len(reasons) == 1 and reasons[0].startswith("answer_paths: 0 members and 1 held-out keys get different answers")


@pytest.mark.parametrize("x, n", [(0, 50), (3, 1000), (120, 10000), (999, 1000)])
def test_clopper_pearson_upper_matches_scipy_exact_interval(x, n):
    # scipy's exact (Clopper-Pearson) two-sided interval at 90% has the one-sided 95% bound as its
    # upper end (scipy.stats.binomtest, SciPy 1.7+; Clopper and Pearson, Biometrika 1934)
    reference = stats.binomtest(x, n).proportion_ci(confidence_level=0.90, method="exact").high
    assert clopper_pearson_upper(x, n, 0.95) == pytest.approx(reference, rel=1e-9)


def test_zero_successes_follow_the_closed_form():
    # with x = 0 the bound solves (1 - p)^n = 1 - c, i.e. p = 1 - (1 - c)^(1/n); about 3/n at 95%
    # ("rule of three", Hanley and Lippman-Hand, JAMA 1983)
    n = 3000
    assert clopper_pearson_upper(0, n, 0.95) == pytest.approx(1 - 0.05 ** (1 / n), rel=1e-9)
    assert clopper_pearson_upper(0, n, 0.95) == pytest.approx(3 / n, rel=0.01)
    assert needed_heldout(0.01, 0.95) == math.ceil(math.log(0.05) / math.log(0.99)) == 299


def test_effective_sample_size_of_equal_and_skewed_weights():
    assert effective_sample_size(np.ones(500)) == pytest.approx(500)
    # one weight of 100 among 99 ones: (199)^2 / (10000 + 99)
    w = np.array([100] + [1] * 99)
    assert effective_sample_size(w) == pytest.approx(199**2 / 10099)


def test_measure_fpr_by_keys_and_by_lookups():
    heldout = KeySet([b"a", b"b", b"c", b"d"], np.array([10, 1, 1, 8]))
    answers = np.array([True, False, False, False])
    by_keys = measure_fpr(answers, heldout, weighted=False, confidence=0.95)
    assert by_keys.fpr == 0.25 and by_keys.false_positive_keys == 1
    by_lookups = measure_fpr(answers, heldout, weighted=True, confidence=0.95)
    assert by_lookups.fpr == pytest.approx(10 / 20) and by_lookups.false_positive_lookups == 10
    assert by_lookups.fpr_upper > by_lookups.fpr


def test_aim_leaves_room_for_the_bound_and_the_noise():
    n = 300_000
    aim = aim_fpr(0.01, n, math.inf, 0.95, 2.0)  # a plan known exactly: held-out noise only
    unlucky = aim * n + 2.0 * math.sqrt(aim * (1 - aim) * n)
    assert clopper_pearson_upper(unlucky, n, 0.95) == pytest.approx(0.01, rel=1e-6)
    # the normal approximation of the same margin (1.645 + 2 standard errors) lands close by
    z = stats.norm.ppf(0.95) + 2.0
    assert aim + z * math.sqrt(aim * (1 - aim) / n) == pytest.approx(0.01, rel=0.01)
    assert aim_fpr(0.01, 1_000, math.inf, 0.95, 2.0) < aim  # fewer held-out keys: aim lower
    # a plan estimated on as many validation draws doubles the variance of the count (the
    # variance of a difference of two independent binomial estimates adds; common practice)
    planned = aim_fpr(0.01, n, n, 0.95, 2.0)
    unlucky = planned * n + 2.0 * math.sqrt(planned * (1 - planned) * 2 * n)
    assert planned < aim and clopper_pearson_upper(unlucky, n, 0.95) == pytest.approx(0.01, rel=1e-6)


def test_the_aim_covers_the_error_of_a_plan_estimated_on_validation_draws():
    """Simulated: a plan sets its rate f on validation draws (estimate f_hat of a true rate p), so
    the true rate is p = f * p / f_hat. Held-out draws then measure p. With the aim covering both
    samples, the gate's bound passes in at least ~97.7% of builds (2 sigmas), as promised."""
    rng = np.random.default_rng(5)
    n, target, builds = 50_000, 0.01, 4_000

    def pass_rate(aim: float) -> float:
        estimate = rng.binomial(n, aim, builds) / n  # the validation estimate of the plan's true rate
        true_rate = aim * aim / estimate  # the plan scales its rate so that the estimate meets the aim
        measured = rng.binomial(n, np.minimum(true_rate, 1.0))
        return float(np.mean([clopper_pearson_upper(x, n, 0.95) <= target for x in measured]))

    passed = pass_rate(aim_fpr(target, n, n, 0.95, 2.0))
    assert passed >= 0.97
    # planning for the held-out noise alone passes visibly less often
    assert pass_rate(aim_fpr(target, n, math.inf, 0.95, 2.0)) < passed - 0.03


def test_a_rate_on_target_passes_the_bound_at_about_the_stated_confidence():
    """Simulated coverage: with the true rate p, the 95% upper bound falls below p about 5% of the
    time or less (Clopper-Pearson is conservative)."""
    rng = np.random.default_rng(5)
    n, p = 20_000, 0.01
    misses = sum(clopper_pearson_upper(x, n, 0.95) < p for x in rng.binomial(n, p, size=2000))
    # at most 5%, plus a 4-sigma binomial allowance on 2000 trials
    assert misses <= 2000 * 0.05 + 4 * math.sqrt(2000 * 0.05 * 0.95)
