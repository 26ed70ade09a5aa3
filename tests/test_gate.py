"""Gate rules: each refuses by name at its threshold, the change limits compare with the version in
service, and a held-out part too small for the target stops the build before training."""

import math

import numpy as np
import pytest

from tamis.config import GateSettings
from tamis.errors import BadInput
from tamis.verify import (
    Baseline,
    Measurement,
    PathAgreement,
    PlainComparison,
    PlanFigures,
    Strata,
    Verification,
    gate_checks,
    needed_heldout_lookups,
    outcome_headroom,
    tail_allowance,
    publishes_plain,
    refusal_reasons,
    require_heldout,
)

TARGET = 0.01
RULES = ["false_negatives", "answer_paths", "fpr_upper", "max_artifact_bytes", "max_size_growth", "max_member_drop"]


def verification(false_negatives: int = 0, fpr_upper: float = 0.008, differing: tuple[int, int] = (0, 0)) -> Verification:
    held = Measurement(confidence=0.95, tau=44, total_lookups=200_000, heavy_keys=0, heavy_lookups=0,
                       heavy_false_positive_keys=0, heavy_false_positive_lookups=0, keys=50_000, lookups=50_000,
                       false_positive_keys=300, false_positive_lookups=300, tail_lookups=200_000, tail_fpr=0.006,
                       tail_fpr_upper=fpr_upper, effective_sample=50_000.0, fpr=0.006, fpr_upper=fpr_upper)
    paths = PathAgreement(("numpy", "compiled", "single"), 10_000, 50_000, *differing)
    return Verification(false_negatives=false_negatives, members_checked=10_000, heldout=held, paths=paths)


def checks(total_bytes: int = 10_000, members: int = 10_000, baseline: Baseline | None = None, check=None, **gate):
    return gate_checks(check or verification(), target=TARGET, total_bytes=total_bytes, members=members,
                       settings=GateSettings(**gate), baseline=baseline)


def advice(plan: PlanFigures, fpr_upper: float = 0.0105) -> str:
    found = gate_checks(verification(fpr_upper=fpr_upper), target=TARGET, total_bytes=1, members=1, settings=GateSettings(),
                        baseline=None, plan=plan)
    return refusal_reasons(found)[0]


def test_a_refused_rate_names_aim_estimate_and_measurement_and_what_would_pass():
    # measured 0.6% (verification()), bound 1.05%: within the target, so a tighter bound would pass
    words = advice(PlanFigures(aim=0.0093, estimate=0.0061, allowed=0.0062))
    assert "aim 0.9300%, plan estimate 0.6100% (allowed 0.6200%), measured 0.6000%" in words
    assert "corpus.heldout_share" in words and "gate.fpr_slack = 0.050" in words
    assert "max_region_fpr" not in words and "aim_sigmas" not in words
    # measured above the plan's estimate: a lower aim, scaled by how far the bound overshot
    words = advice(PlanFigures(aim=0.0093, estimate=0.005, allowed=0.0062))
    assert "1.20x the plan's estimate" in words and f"near {0.0093 / 1.05:.4%}" in words and "gate.aim_sigmas" in words
    # no plan fitted its allowance: a cap or the plain filter
    words = advice(PlanFigures(aim=0.0093, estimate=0.0070, allowed=None))
    assert "allowed nothing" in words and "regions.max_region_fpr" in words and "publish_plain" in words


def reasons(**kwargs) -> list[str]:
    return refusal_reasons(checks(**kwargs))


IN_SERVICE = Baseline(version=4, total_bytes=10_000, members=10_000)


def test_a_good_build_passes_every_rule_in_order():
    found = checks(baseline=IN_SERVICE)
    assert [c.rule for c in found] == RULES
    assert all(c.passed for c in found) and refusal_reasons(found) == []


def test_each_refusal_starts_with_its_rule_name():
    assert reasons(check=verification(false_negatives=3)) == [
        "false_negatives: 3 members answered no (through numpy, compiled, single)"
    ]
    assert reasons(check=verification(differing=(2, 0)))[0].startswith(
        "answer_paths: 2 members and 0 held-out keys get different answers from two answer paths"
    )
    assert reasons(check=verification(differing=(0, 1)))[0].startswith("answer_paths: 0 members and 1 held-out keys")
    assert reasons(check=verification(fpr_upper=0.0101))[0].startswith("fpr_upper: ")
    assert reasons(total_bytes=10_001, max_artifact_bytes=10_000)[0].startswith("max_artifact_bytes: ")
    assert reasons(total_bytes=15_001, baseline=IN_SERVICE)[0].startswith("max_size_growth: ")
    assert reasons(members=7_999, baseline=IN_SERVICE)[0].startswith("max_member_drop: ")


def test_several_failed_rules_are_all_named():
    found = reasons(check=verification(false_negatives=1, fpr_upper=0.5, differing=(1, 0)), total_bytes=40_000, members=1_000,
                    baseline=IN_SERVICE, max_artifact_bytes=20_000)
    assert [r.split(":")[0] for r in found] == RULES


def test_fpr_slack_widens_the_allowed_bound():
    assert reasons(check=verification(fpr_upper=0.0109)) != []
    assert reasons(check=verification(fpr_upper=0.0109), fpr_slack=0.1) == []


@pytest.mark.parametrize("total_bytes, refused", [(15_000, False), (15_001, True), (9_000, False)])
def test_size_growth_is_measured_against_the_version_in_service(total_bytes, refused):
    # the default limit is +50%: 15,000 bytes against 10,000 is exactly at it
    found = reasons(total_bytes=total_bytes, baseline=IN_SERVICE)
    assert bool(found) is refused
    if refused:
        assert "version 4" in found[0] and "+50.0%" in found[0] and "--no-change-limits" in found[0]


@pytest.mark.parametrize("members, refused", [(8_000, False), (7_999, True), (12_000, False)])
def test_member_drop_is_measured_against_the_version_in_service(members, refused):
    # the default limit is a 20% drop: 8,000 members against 10,000 is exactly at it
    found = reasons(members=members, baseline=IN_SERVICE)
    assert bool(found) is refused
    if refused:
        assert "7,999 members against 10,000 in version 4" in found[0]


def test_change_limits_need_a_version_in_service_and_zero_turns_them_off():
    assert reasons(total_bytes=90_000, members=10, baseline=None) == []
    assert reasons(total_bytes=90_000, members=10, baseline=IN_SERVICE, max_size_growth=0.0, max_member_drop=0.0) == []
    details = {c.rule: c.detail for c in checks(baseline=None)}
    assert details["max_size_growth"] == "no version in service to compare with"
    assert details["max_artifact_bytes"].startswith("off")


def test_every_check_reports_plain_values():
    for check in checks(baseline=IN_SERVICE, max_artifact_bytes=20_000):
        row = check.as_report()
        assert set(row) == {"rule", "passed", "value", "limit", "detail"}
        assert all(isinstance(row[k], (int, float)) for k in ("value", "limit"))


# ------------------------------------------------------------------------------- min_heldout


def window(heldout_counts, tail_lookups=None, heavy=()) -> Strata:
    counts = np.asarray(heldout_counts, dtype=np.int64)
    heavy = np.asarray(heavy, dtype=np.int64)
    tail = int(counts.sum() / 0.3) if tail_lookups is None else tail_lookups
    return Strata(44, int(heavy.sum()) + tail, heavy, tail, int(counts.max()) if len(counts) else 0, counts)


def test_without_counts_the_need_is_the_zero_failure_sample_size():
    # no false positive among n held-out keys bounds the rate at -ln(1 - c) / n (the Poisson form
    # of the "rule of three", about 3 / n; Hanley and Lippman-Hand, JAMA 1983): 300 keys for 1% at 95%
    need = math.ceil(-math.log(0.05) / TARGET)
    assert need == 300
    assert needed_heldout_lookups(window(np.ones(need), 3 * need), TARGET, 0.95) == pytest.approx(-math.log(0.05) / TARGET)
    require_heldout(window(np.ones(need), 3 * need), TARGET, GateSettings(), 0.3)
    with pytest.raises(BadInput) as refused:
        require_heldout(window(np.ones(need - 1), 3 * (need - 1)), TARGET, GateSettings(), 0.3)
    message = str(refused.value)
    assert message.startswith("min_heldout: the tail (keys looked up fewer than tau = 44 times) has 299 held-out keys")
    assert "at least 300 held-out tail lookups" in message and "times as much log" in message
    assert "non-members" in message and "corpus.heldout_share (now 0.3)" in message and "corpus.heavy_count" in message


def test_with_counts_only_the_tail_is_asked():
    # 1,000 held-out light keys of count 1 and one of 40 (weight 40 / share in the tail's estimate):
    # the need grows with the largest light count, not with the heavy keys' lookups
    light = np.concatenate([np.ones(1000), [40]])
    tail = int(light.sum() / 0.3)
    lean = window(light, tail)
    need = needed_heldout_lookups(lean, TARGET, 0.95)
    assert need == pytest.approx(-math.log(0.05) * 40 * tail / (TARGET * tail))
    with pytest.raises(BadInput, match="largest light count is 40"):
        require_heldout(lean, TARGET, GateSettings(), 0.25)
    # a million lookups of heavy keys, answered exactly, make the tail a small share: enough now
    require_heldout(window(light, tail, heavy=np.full(100, 10_000)), TARGET, GateSettings(), 0.25)


def test_min_heldout_raises_the_floor_above_the_statistical_need():
    settings = GateSettings(min_heldout=5000)
    with pytest.raises(BadInput, match="gate.min_heldout asks for an effective sample of 5,000"):
        require_heldout(window(np.ones(4000)), TARGET, settings, 0.3)
    require_heldout(window(np.ones(5000)), TARGET, settings, 0.3)


@pytest.mark.parametrize("target", [0.05, 0.01, 0.001, 1e-4])
def test_the_need_is_the_zero_failure_closed_form(target):
    # n = -ln(1 - c) / F held-out keys without counts (common practice in acceptance sampling)
    assert needed_heldout_lookups(window(np.ones(10)), target, 0.95) == pytest.approx(-math.log(0.05) / target)


# --- model_pays: the learned artifact against the plain filter it would replace -------------------


@pytest.mark.parametrize(
    "learned, policy, passed, plain_published, says",
    [
        (9_000, "publish", True, False, "the learned artifact takes 9,000 bytes, -10.0% against 10,000"),
        (11_000, "publish", True, False, "the model does not pay; published anyway"),
        (11_000, "publish_plain", True, True, "the model does not pay; the plain filter is published"),
        (11_000, "refuse", False, False, "the model does not pay; refused"),
        (10_000, "publish_plain", True, True, "+0.0% against 10,000"),  # no saving: the plain one is simpler
        (9_000, "refuse", True, False, "-10.0%"),
    ],
)
def test_model_pays_compares_with_the_plain_filter(learned, policy, passed, plain_published, says):
    comparison = PlainComparison(learned_bytes=learned, plain_bytes=10_000)
    found = gate_checks(verification(), target=TARGET, total_bytes=learned, members=10_000,
                        settings=GateSettings(when_model_does_not_pay=policy), baseline=None, comparison=comparison)
    rule = found[-1]
    assert [c.rule for c in found] == RULES + ["model_pays"]
    assert rule.passed is passed and says in rule.detail
    assert rule.value == learned / 10_000 and rule.limit == 1.0
    assert publishes_plain(comparison, policy) is plain_published
    if not passed:
        assert refusal_reasons(found) == [f"model_pays: {rule.detail}"]


def test_the_tail_allowance_and_the_headroom_of_a_built_outcome_agree():
    # A window of 1,000,000 lookups: 100 heavy keys of 5,000 lookups, a tail of 500,000 lookups
    # sampled by 50,000 held-out and 20,000 check keys of 1 to 43 lookups.
    rng = np.random.default_rng(5)
    strata = Strata(tau=44, lookups=1_000_000, heavy_counts=np.full(100, 5000), tail_lookups=500_000, tail_max_count=43,
                    heldout_counts=rng.integers(1, 44, 50_000))
    check = rng.integers(1, 44, 20_000)
    heavy_fp, tail = 2_000.0, 0.004
    scale = outcome_headroom(TARGET, strata, check, 0.95, 2.0, heavy_fp, tail)
    assert scale > 1  # 0.6% expected against a 1% target: room to grow
    # grown by that factor, the outcome sits on the allowance for its heavy part
    assert tail_allowance(TARGET, strata, check, 0.95, 2.0, heavy_fp * scale) == pytest.approx(tail * scale, rel=1e-6)
    # more heavy false positives leave less room for the tail, and too many leave none
    assert tail_allowance(TARGET, strata, check, 0.95, 2.0, 4 * heavy_fp) < tail_allowance(TARGET, strata, check, 0.95, 2.0, heavy_fp)
    assert tail_allowance(TARGET, strata, check, 0.95, 2.0, 0.02 * strata.lookups) is None


def test_the_unlike_keys_rule_is_off_by_default_and_refuses_above_its_limit():
    from tamis.verify import _check_unlike_rate

    off = _check_unlike_rate("hex digests", 0.207, 0.0)
    assert off.passed and off.limit is None and "20.70%" in off.detail
    assert _check_unlike_rate("hex digests", 0.05, 0.1).passed
    refused = _check_unlike_rate("hex digests", 0.207, 0.1)
    assert not refused.passed and "regions.max_region_fpr" in refused.detail and "hex digests" in refused.detail
