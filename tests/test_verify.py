"""Verify stage: every answer path checked on every member, and the statistics against reference
formulas and scipy."""

import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from golden_build import write_fixed_corpus
from tamis import compiled
from tamis import verify as verify_module
from tamis.config import GateSettings
from tamis.corpus import Corpus, KeySet
from tamis.errors import BadInput
from tamis.loader import MembershipFilter, answer_paths, open_filter
from tamis.query import available_paths
from tamis.verify import (
    Strata,
    aim_fpr,
    best_of_quantile,
    check_filter,
    effective_sample_size,
    gamma_upper,
    gate_checks,
    measure,
    rate_upper,
    refusal_reasons,
    verification,
)

# The format's reference artifact holds the members of golden_build's fixed corpus.
REFERENCE_ARTIFACT = Path(__file__).parent / "data" / "format-1.0.tamis"


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    members_path, others_path = write_fixed_corpus(tmp_path_factory.mktemp("fixed"))
    members = members_path.read_bytes().splitlines()
    others = others_path.read_bytes().splitlines()
    return {"members": members, "heldout": KeySet(others, np.ones(len(others), dtype=np.int64))}


def _corpus(members, heldout: KeySet) -> Corpus:
    """A corpus without counts whose non-members are all held out."""
    none = KeySet([], np.zeros(0, dtype=np.int64))
    return Corpus(members=members, heavy=none, train=none, validation=none, check=none, heldout=heldout, tau=44,
                  has_counts=False, stats={})


def _verdict(members, heldout) -> tuple:
    checked = check_filter(open_filter(REFERENCE_ARTIFACT), _corpus(members, heldout), 0.95)
    reasons = refusal_reasons(gate_checks(checked, target=0.5, total_bytes=1, members=len(members),
                                          settings=GateSettings(), baseline=None))
    return checked, reasons


def test_every_member_and_a_sample_of_non_members_go_through_every_answer_path(reference):
    checked, reasons = _verdict(reference["members"], reference["heldout"])
    assert checked.false_negatives == 0 and reasons == []
    assert checked.paths.paths == answer_paths() and len(answer_paths()) >= 2
    # what the artifact will record as verified, and what was not with why
    assert checked.paths.query_paths == available_paths()
    assert checked.paths.not_verified == ({} if compiled.ENABLED else {"compiled": compiled.DISABLED_BECAUSE})
    assert checked.paths.members == len(reference["members"])
    assert checked.paths.nonmembers == len(reference["heldout"].keys)  # below the sample cap: all of them
    assert checked.paths.members_differing == checked.paths.nonmembers_differing == 0


def test_the_numpy_single_key_path_in_a_worker_process_answers_as_in_this_one(reference, monkeypatch, tmp_path):
    # members and non-members, the empty key, NUL and non-ASCII bytes, answered by the worker process
    # (the threshold lowered to take it) and in this process: the same (keys, paths) table
    keys = reference["members"][:300] + reference["heldout"].keys[:700] + [b"", b"\x00x\x00", "h\u00e9ros".encode()]
    loaded = open_filter(REFERENCE_ARTIFACT)
    here = verify_module.every_path_answers(loaded, keys)
    monkeypatch.setattr(verify_module, "WORKER_PROCESS_KEYS", 1)
    assert np.array_equal(verify_module.every_path_answers(loaded, keys), here)
    assert here[:300].all() and not here[300:].all()
    # a worker that cannot answer is an error that says so, never a column of guesses
    missing = tmp_path / "gone.tamis"
    missing.write_bytes(REFERENCE_ARTIFACT.read_bytes())
    opened = open_filter(missing)
    missing.unlink()
    with pytest.raises(RuntimeError, match="could not be computed in a worker process"):
        verify_module.every_path_answers(opened, keys)


def test_answers_through_fewer_paths_than_this_process_has_are_refused(reference):
    # e.g. cluster workers without numba: the artifact must not record a path they did not run
    strata = Strata(tau=1, lookups=1, heavy_counts=np.zeros(0, np.int64), tail_lookups=0, tail_max_count=0,
                    heldout_counts=np.zeros(0, np.int64))
    fewer = np.ones((3, len(answer_paths()) - 1), dtype=bool)
    with pytest.raises(BadInput, match="install the same extras"):
        verification(fewer, fewer[:0], np.zeros(0, bool), np.zeros(0, bool), strata, 0.95)


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


def strata(heavy=(), heldout=(1,) * 1000, tail_lookups=None, tail_max=None, tau=44) -> Strata:
    heavy, heldout = np.asarray(heavy, dtype=np.int64), np.asarray(heldout, dtype=np.int64)
    tail = int(heldout.sum() / 0.3) if tail_lookups is None else tail_lookups
    return Strata(
        tau=tau,
        lookups=int(heavy.sum()) + tail,
        heavy_counts=heavy,
        tail_lookups=tail,
        tail_max_count=int(heldout.max()) if tail_max is None else tail_max,
        heldout_counts=heldout,
    )


@pytest.mark.parametrize("x", [0, 1, 7, 250])
def test_unit_weights_give_the_exact_poisson_bound(x):
    # Garwood's exact upper limit for a Poisson mean: chi2_{2(x+1)} quantile / 2 (F. Garwood,
    # Biometrika 1936; common practice)
    assert gamma_upper(x, x, 1.0, 0.95) == pytest.approx(stats.chi2.ppf(0.95, 2 * (x + 1)) / 2, rel=1e-9)


@pytest.mark.parametrize("x, w", [(0, 5.0), (12, 3.0), (400, 40.0)])
def test_one_weight_scales_the_poisson_bound(x, w):
    # x events of weight w each: total w x, variance estimate w^2 x, largest weight w; the gamma
    # limit is then w times the exact Poisson limit (Fay and Feuer, Statistics in Medicine 1997)
    assert gamma_upper(w * x, w * w * x, w, 0.95) == pytest.approx(w * stats.chi2.ppf(0.95, 2 * (x + 1)) / 2, rel=1e-9)


def test_without_counts_the_bound_is_close_to_clopper_pearson():
    # one lookup a key, 300 false positives among 30,000 held-out keys of 100,000: the Poisson
    # bound on the rate by keys sits just above the exact binomial one (C. J. Clopper and E. S.
    # Pearson, Biometrika 1934), as the Poisson law is wider than the binomial
    upper = rate_upper(100_000, 0, 300, 300, 0.3, 1, 0.95)
    exact = stats.beta.ppf(0.95, 301, 30_000 - 300)
    assert exact < upper < exact * 1.01
    # no false positive: the "rule of three", about 3 / n (Hanley and Lippman-Hand, JAMA 1983)
    assert rate_upper(100_000, 0, 0, 0, 0.3, 1, 0.95) == pytest.approx(-math.log(0.05) / 30_000, rel=1e-9)


def test_effective_sample_size_of_equal_and_skewed_weights():
    assert effective_sample_size(np.ones(500)) == pytest.approx(500)
    # one weight of 100 among 99 ones: (199)^2 / (10000 + 99)
    w = np.array([100] + [1] * 99)
    assert effective_sample_size(w) == pytest.approx(199**2 / 10099)


def test_heavy_keys_count_exactly_and_the_tail_is_scaled_by_its_held_out_share():
    window = strata(heavy=[5000, 100, 60], heldout=[1, 2, 3, 4] * 250, tail_lookups=10_000)
    heavy_answers = np.array([False, True, False])
    heldout_answers = np.zeros(1000, dtype=bool)
    heldout_answers[:10] = True  # counts 1, 2, 3, 4, 1, 2, 3, 4, 1, 2: 23 lookups
    found = measure(heavy_answers, heldout_answers, window, 0.95)
    assert found.heavy_false_positive_lookups == 100 and found.false_positive_lookups == 23
    # held-out share of the tail's lookups: 2,500 / 10,000; the tail's false positives are 23 / 0.25
    assert found.fpr == pytest.approx((100 + 23 / 0.25) / (5160 + 10_000))
    assert found.tail_fpr == pytest.approx(23 / 2500)
    assert found.fpr < found.fpr_upper < 1 and found.tail_fpr < found.tail_fpr_upper
    # a heavy key that answers maybe costs its whole weight
    hot = measure(np.array([True, False, False]), heldout_answers, window, 0.95)
    assert hot.fpr == pytest.approx((5000 + 92) / 15_160) and hot.fpr_upper > found.fpr_upper


def test_the_aim_leaves_room_for_the_bound_and_the_noise():
    window = strata(heldout=np.ones(300_000))
    plan_known = np.ones(10**7)  # a plan estimated on a vast validation part: hardly any plan error
    aim = aim_fpr(0.01, window, plan_known, 0.95, 2.0)
    assert 0.009 < aim < 0.01
    # the normal approximation of the same margin (1.645 + 2 standard errors) lands close by
    n = 300_000
    z = stats.norm.ppf(0.95) + 2.0
    assert aim + z * math.sqrt(aim / n) == pytest.approx(0.01, rel=0.01)
    # fewer held-out keys, or a plan estimated on fewer keys: a lower aim
    assert aim_fpr(0.01, strata(heldout=np.ones(3000)), plan_known, 0.95, 2.0) < aim
    assert aim_fpr(0.01, window, np.ones(300_000), 0.95, 2.0) < aim


def test_heavy_keys_lift_the_aim_that_sampling_them_would_sink():
    # the same lookups, once with 50 keys of 1,000 lookups held out among the tail, once as a
    # take-all stratum: the aim rises when they are answered exactly and the build picks seeds
    rng = np.random.default_rng(3)
    light = rng.integers(1, 10, 100_000)
    sampled = strata(heldout=np.concatenate([light, np.full(15, 1000)]))
    validation = np.concatenate([light, np.full(15, 1000)])
    exact = strata(heavy=np.full(50, 1000), heldout=light, tail_lookups=sampled.tail_lookups - 50_000)
    assert aim_fpr(0.01, exact, light, 0.95, 2.0, seed_candidates=8) > aim_fpr(0.01, sampled, validation, 0.95, 2.0)


def test_the_best_of_several_seeds_needs_less_room_for_luck():
    assert best_of_quantile(2.0, 1) == pytest.approx(2.0)
    # the least of m draws exceeds x with chance P(one exceeds x)^m
    x = best_of_quantile(2.0, 2)
    assert stats.norm.sf(x) ** 2 == pytest.approx(stats.norm.sf(2.0), rel=1e-9)
    assert best_of_quantile(2.0, 8) == 0.0


def test_the_aim_covers_the_error_of_a_plan_estimated_on_validation_draws():
    """Simulated: a plan sets its rate f on validation draws (estimate f_hat of a true rate p), so
    the true rate is p = f * p / f_hat. Held-out draws then measure p. With the aim covering both
    samples, the gate's bound passes in at least ~97.7% of builds (2 sigmas), as promised."""
    rng = np.random.default_rng(5)
    n, target, builds = 50_000, 0.01, 4_000
    window = strata(heldout=np.ones(n), tail_lookups=3 * n)

    def pass_rate(aim: float) -> float:
        estimate = rng.binomial(n, aim, builds) / n  # the validation estimate of the plan's true rate
        true_rate = aim * aim / estimate  # the plan scales its rate so that the estimate meets the aim
        measured = rng.binomial(n, np.minimum(true_rate, 1.0))
        upper = rate_upper(window.lookups, 0, measured, measured, 1 / 3, 1, 0.95)
        return float(np.mean(upper <= target))

    passed = pass_rate(aim_fpr(target, window, np.ones(n), 0.95, 2.0))
    assert passed >= 0.97
    # planning for the held-out noise alone passes visibly less often
    assert pass_rate(aim_fpr(target, window, np.ones(10**7), 0.95, 2.0)) < passed - 0.03
