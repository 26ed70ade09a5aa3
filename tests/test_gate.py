"""Gate rules: each refuses by name at its threshold, the change limits compare with the version in
service, and a held-out part too small for the target stops the build before training."""

import math

import numpy as np
import pytest

from tamis.config import GateSettings
from tamis.corpus import KeySet
from tamis.errors import BadInput
from tamis.verify import (
    Baseline,
    Measurement,
    PathAgreement,
    PlainComparison,
    Verification,
    clopper_pearson_upper,
    gate_checks,
    needed_heldout,
    publishes_plain,
    refusal_reasons,
    require_heldout,
)

TARGET = 0.01
RULES = ["false_negatives", "answer_paths", "fpr_upper", "max_artifact_bytes", "max_size_growth", "max_member_drop"]


def verification(false_negatives: int = 0, fpr_upper: float = 0.008, differing: tuple[int, int] = (0, 0)) -> Verification:
    held = Measurement(keys=50_000, lookups=50_000, false_positive_keys=300, false_positive_lookups=300,
                       fpr=0.006, fpr_upper=fpr_upper, confidence=0.95, effective_sample=50_000.0)
    paths = PathAgreement(("numpy", "compiled", "single"), 10_000, 50_000, *differing)
    return Verification(false_negatives=false_negatives, members_checked=10_000, heldout=held, paths=paths)


def checks(total_bytes: int = 10_000, members: int = 10_000, baseline: Baseline | None = None, check=None, **gate):
    return gate_checks(check or verification(), target=TARGET, total_bytes=total_bytes, members=members,
                       settings=GateSettings(**gate), baseline=baseline)


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


def heldout(counts) -> KeySet:
    counts = np.asarray(counts, dtype=np.int64)
    return KeySet([b"k%d" % i for i in range(len(counts))], counts)


def test_without_counts_the_need_is_the_zero_failure_sample_size():
    # (1 - F)^n <= 1 - c: 299 draws for 1% at 95% (the "rule of three", n about 3 / F; Hanley and
    # Lippman-Hand, JAMA 1983); with one fewer, even no false positive leaves the bound above 1%
    need = needed_heldout(TARGET, 0.95)
    assert need == 299
    assert clopper_pearson_upper(0, need, 0.95) <= TARGET < clopper_pearson_upper(0, need - 1, 0.95)
    assert require_heldout(heldout(np.ones(need)), False, TARGET, GateSettings(), 0.3) == need
    with pytest.raises(BadInput) as refused:
        require_heldout(heldout(np.ones(need - 1)), False, TARGET, GateSettings(), 0.3)
    message = str(refused.value)
    assert message.startswith("min_heldout: ")
    assert "298 held-out keys" in message and "at least 299 keys" in message
    assert "non-members" in message and "corpus.heldout_share (now 0.3)" in message and "target" in message


def test_with_counts_the_effective_sample_decides():
    # 1,000 keys, one looked up 1,000 times: Kish's n_eff = (sum w)^2 / sum w^2 = 1999^2 / (10^6 + 999)
    counts = np.ones(1000)
    counts[0] = 1000
    n_eff = 1999**2 / (1000**2 + 999)
    assert n_eff < needed_heldout(TARGET, 0.95) < 1000
    with pytest.raises(BadInput) as refused:
        require_heldout(heldout(counts), True, TARGET, GateSettings(), 0.25)
    message = str(refused.value)
    assert f"1,000 held-out keys with lookup counts, worth an effective sample of {n_eff:,.1f} draws" in message
    assert "Kish" in message and "at least 299 draws" in message and "(now 0.25)" in message
    assert require_heldout(heldout(counts), False, TARGET, GateSettings(), 0.25) == 1000  # as keys it is enough


def test_min_heldout_raises_the_floor_above_the_statistical_need():
    settings = GateSettings(min_heldout=5000)
    with pytest.raises(BadInput, match="gate.min_heldout asks for 5,000"):
        require_heldout(heldout(np.ones(4000)), False, TARGET, settings, 0.3)
    assert require_heldout(heldout(np.ones(5000)), False, TARGET, settings, 0.3) == 5000


@pytest.mark.parametrize("target", [0.05, 0.01, 0.001, 1e-4])
def test_the_need_is_the_published_closed_form(target):
    # n = ceil(ln(1 - c) / ln(1 - F)), the zero-failure sample size (common practice in acceptance sampling)
    assert needed_heldout(target, 0.95) == math.ceil(math.log(0.05) / math.log(1 - target))


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
