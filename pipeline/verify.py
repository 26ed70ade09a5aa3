"""Verify stage: reload the written artifact with the loader, check every member, measure the
false-positive rate on held-out non-members, and decide the gate.

The held-out keys were never used for training, model choice or region choice (invariant 3), so the
rate measured here is an honest estimate of the rate the service will see on lookups drawn like them.

Gate rules (each refusal starts with the rule's name; the thresholds are `config.GateSettings`):

    min_heldout          before training: the held-out part can bound the rate at the target at all
    false_negatives      every member answers "maybe", through every answer path of the loader
    answer_paths         the paths answer alike: every member and a sample of held-out keys
    fpr_upper            the held-out rate's upper confidence bound <= target * (1 + fpr_slack)
    max_artifact_bytes   the artifact file is at most this large
    max_size_growth      at most this share more bytes than the version in service
    max_member_drop      at most this share fewer members than the version in service
    model_pays           the learned artifact is smaller than the plain filter it would replace; when
                         it is not, gate.when_model_does_not_pay says what happens (see `PlainComparison`)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from tamis.config import GateSettings
from tamis.corpus import KeySet
from tamis.errors import BadInput
from tamis.loader import MembershipFilter, answer_paths


@dataclass(frozen=True)
class Measurement:
    keys: int
    lookups: int
    false_positive_keys: int
    false_positive_lookups: int
    fpr: float
    fpr_upper: float
    confidence: float
    effective_sample: float

    def as_report(self) -> dict:
        return {
            "keys": self.keys,
            "lookups": self.lookups,
            "false_positives": self.false_positive_keys,
            "false_positive_lookups": self.false_positive_lookups,
            "fpr": self.fpr,
            "fpr_upper": self.fpr_upper,
            "confidence": self.confidence,
            "effective_sample": self.effective_sample,
        }


def clopper_pearson_upper(successes: float, trials: float, confidence: float) -> float:
    """One-sided upper confidence bound on a binomial rate: the `confidence` quantile of
    Beta(x + 1, n - x) (C. J. Clopper and E. S. Pearson, Biometrika 26(4), 1934). Real-valued x and n
    are allowed, for effective sample sizes."""
    if trials <= 0:
        return 1.0
    if successes >= trials:
        return 1.0
    return float(stats.beta.ppf(confidence, successes + 1.0, trials - successes))


def effective_sample_size(weights: np.ndarray) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2 of a weighted sample (L. Kish, Survey
    Sampling, 1965): how many unweighted draws carry the same information as these weighted ones."""
    w = weights.astype(np.float64)
    square_sum = float(np.dot(w, w))
    return float(w.sum()) ** 2 / square_sum if square_sum else 0.0


def measure_fpr(answers: np.ndarray, heldout: KeySet, weighted: bool, confidence: float) -> Measurement:
    """The false-positive rate of `answers` (True = maybe) on held-out non-members.

    By lookups when the corpus has counts (the rate the service sees), by distinct keys otherwise;
    the upper bound is Clopper-Pearson on distinct keys, or on the effective sample size with counts.
    """
    counts = heldout.counts
    fp_keys = int(answers.sum())
    fp_lookups = int(counts[answers].sum())
    lookups = int(counts.sum())
    if weighted:
        fpr = fp_lookups / lookups
        n_eff = effective_sample_size(counts)
        upper = clopper_pearson_upper(fpr * n_eff, n_eff, confidence)
    else:
        fpr = fp_keys / len(answers)
        n_eff = float(len(answers))
        upper = clopper_pearson_upper(fp_keys, len(answers), confidence)
    return Measurement(len(answers), lookups, fp_keys, fp_lookups, fpr, upper, confidence, n_eff)


def aim_fpr(target: float, effective_sample: float, plan_sample: float, confidence: float, aim_sigmas: float) -> float:
    """The rate to plan for so that a build hitting it passes the gate with high probability.

    On n held-out draws a true rate f gives about f n false positives. The plan's rate is itself
    estimated on `plan_sample` validation draws, so the count also moves with the plan's error: its
    variance is f (1-f) n (1 + n / plan_sample), the held-out draws' own binomial variance plus n^2
    times that of the validation estimate. In all but the unluckiest builds the count stays below
    x(f) = f n + s sqrt(f (1-f) n (1 + n / plan_sample)) (s = `aim_sigmas` standard deviations).
    Plan for the largest f whose x(f) still has a Clopper-Pearson upper bound at most the target;
    both sides grow with f, so bisection finds it.
    """
    n = effective_sample
    spread = n * (1 + n / plan_sample)

    def passes(f: float) -> bool:
        unlucky = f * n + aim_sigmas * math.sqrt(f * (1 - f) * spread)
        return clopper_pearson_upper(unlucky, n, confidence) <= target

    low, high = 0.0, target
    for _ in range(50):
        mid = (low + high) / 2
        low, high = (mid, high) if passes(mid) else (low, mid)
    return low


def needed_heldout(target: float, confidence: float) -> int:
    """The fewest held-out draws for which a perfect result (no false positive) can bound the rate
    below the target: (1 - target)^n <= 1 - confidence, i.e. n >= ln(1 - c) / ln(1 - F)."""
    return math.ceil(math.log(1 - confidence) / math.log1p(-target))


def heldout_sample(heldout: KeySet, weighted: bool) -> float:
    """How many independent draws the held-out part is worth: its keys, or with lookup counts
    their effective sample size (the rate is by lookups, so heavy keys weigh more)."""
    return effective_sample_size(heldout.counts) if weighted else float(len(heldout.keys))


def require_heldout(heldout: KeySet, weighted: bool, target: float, settings: GateSettings, heldout_share: float) -> float:
    """Rule min_heldout, before any training: stop with BadInput when the held-out part is too
    small to show that the target is met; otherwise return its sample size (`heldout_sample`)."""
    sample = heldout_sample(heldout, weighted)
    statistical = needed_heldout(target, settings.confidence)
    if sample >= max(statistical, settings.min_heldout):
        return sample
    if weighted:
        have = (
            f"{len(heldout.keys):,} held-out keys with lookup counts, worth an effective sample of {sample:,.1f} draws "
            f"(Kish: (sum of counts)^2 / sum of squared counts; a few heavy keys weigh like few draws)"
        )
        unit = "draws"
    else:
        have = f"{len(heldout.keys):,} held-out keys"
        unit = "keys"
    need = (
        f"a target of {target:.4%} at {settings.confidence:.0%} confidence needs at least {statistical:,} {unit} "
        f"(with fewer, even a filter without a false positive cannot be shown to meet it)"
    )
    if settings.min_heldout > statistical:
        need += f", and gate.min_heldout asks for {settings.min_heldout:,}"
    raise BadInput(
        f"min_heldout: the corpus has {have}; {need}. To fix: give more non-members (the sample grows about in "
        f"proportion), raise corpus.heldout_share (now {heldout_share:g}), or raise the target"
    )


# Held-out keys answered through every answer path (all of them answer through the service's own
# path for the rate): a path that differs on a share p of non-members shows in the sample with
# probability 1 - (1 - p)^100,000, 99.995% for p = 0.01%. Every member goes through every path.
PATH_SAMPLE_KEYS = 100_000


def path_sample(keys: list[bytes]) -> list[bytes]:
    """At most PATH_SAMPLE_KEYS of `keys`, evenly spaced, to answer through every answer path."""
    return keys[:: max(1, -(-len(keys) // PATH_SAMPLE_KEYS))]


def every_path_answers(loaded: MembershipFilter, keys: list[bytes]) -> np.ndarray:
    """Each key's answer through each answer path of the loader, (keys, paths) in `answer_paths()` order."""
    return np.column_stack([loaded.answers_through(path, keys) for path in answer_paths()]).reshape(len(keys), -1)


@dataclass(frozen=True)
class PathAgreement:
    """Members and sampled non-members answered through every answer path, and how many of each got
    different answers from two paths."""

    paths: tuple[str, ...]
    members: int
    nonmembers: int
    members_differing: int
    nonmembers_differing: int

    def as_report(self) -> dict:
        return {"paths": list(self.paths), "members": self.members, "nonmembers": self.nonmembers,
                "members_differing": self.members_differing, "nonmembers_differing": self.nonmembers_differing}


def _differing(answers: np.ndarray) -> int:
    return int(np.count_nonzero(answers.any(axis=1) != answers.all(axis=1)))


@dataclass(frozen=True)
class Verification:
    false_negatives: int
    members_checked: int
    heldout: Measurement
    paths: PathAgreement


def verification(member_answers: np.ndarray, sample_answers: np.ndarray, heldout_answers: np.ndarray,
                 heldout: KeySet, weighted: bool, confidence: float) -> Verification:
    """The verdict on a filter from its answers: to every member and to a sample of held-out keys
    through every answer path ((keys, paths), `every_path_answers`), and to every held-out key
    through the service's path. A member is a false negative when any path answers it "no"."""
    false_negatives = int(len(member_answers) - np.count_nonzero(member_answers.all(axis=1)))
    paths = PathAgreement(answer_paths(), len(member_answers), len(sample_answers),
                          _differing(member_answers), _differing(sample_answers))
    return Verification(false_negatives, len(member_answers), measure_fpr(heldout_answers, heldout, weighted, confidence), paths)


def check_filter(loaded: MembershipFilter, members: list[bytes], heldout: KeySet, weighted: bool, confidence: float) -> Verification:
    """Query every member and a sample of held-out keys through every answer path of an opened
    filter, and every held-out key through `contains_many`."""
    return verification(every_path_answers(loaded, members), every_path_answers(loaded, path_sample(heldout.keys)),
                        loaded.contains_many(heldout.keys), heldout, weighted, confidence)


@dataclass(frozen=True)
class Baseline:
    """The version in service, as the change limits see it."""

    version: int
    total_bytes: int
    members: int


@dataclass(frozen=True)
class GateCheck:
    """One gate rule's verdict. `limit` is None when the rule is off or has nothing to compare with;
    `detail` says why it refused, or what it found."""

    rule: str
    passed: bool
    value: float | None
    limit: float | None
    detail: str

    def as_report(self) -> dict:
        return {"rule": self.rule, "passed": self.passed, "value": self.value, "limit": self.limit, "detail": self.detail}


def _check_false_negatives(verification: Verification) -> GateCheck:
    missed = verification.false_negatives
    paths = ", ".join(verification.paths.paths)
    if missed:
        return GateCheck("false_negatives", False, missed, 0, f"{missed} members answered no (through {paths})")
    return GateCheck("false_negatives", True, 0, 0, f"all {verification.members_checked:,} members answer maybe through {paths}")


def _check_answer_paths(agreement: PathAgreement) -> GateCheck:
    differing = agreement.members_differing + agreement.nonmembers_differing
    words = (
        f"{agreement.members:,} members and {agreement.nonmembers:,} held-out keys through {', '.join(agreement.paths)}"
    )
    if differing:
        return GateCheck(
            "answer_paths", False, differing, 0,
            f"{agreement.members_differing:,} members and {agreement.nonmembers_differing:,} held-out keys get different "
            f"answers from two answer paths (of {words}); every path must answer every key alike: this is a defect of "
            f"tamis (report it with the artifact), or set TAMIS_NUMPY_ONLY=1 to build and serve on the numpy path",
        )
    return GateCheck("answer_paths", True, 0, 0, f"{words} answer alike")


def _check_fpr_upper(verification: Verification, target: float, fpr_slack: float) -> GateCheck:
    held = verification.heldout
    limit = target * (1 + fpr_slack)
    words = f"the held-out rate's {held.confidence:.0%} upper bound {held.fpr_upper:.4%}"
    if held.fpr_upper > limit:
        return GateCheck("fpr_upper", False, held.fpr_upper, limit, f"{words} is above the allowed {limit:.4%}")
    return GateCheck("fpr_upper", True, held.fpr_upper, limit, f"{words} is within the allowed {limit:.4%}")


def _check_artifact_bytes(total_bytes: int, max_bytes: int) -> GateCheck:
    if not max_bytes:
        return GateCheck("max_artifact_bytes", True, total_bytes, None, "off (gate.max_artifact_bytes = 0)")
    if total_bytes > max_bytes:
        return GateCheck(
            "max_artifact_bytes", False, total_bytes, max_bytes,
            f"the artifact has {total_bytes} bytes, over the limit of {max_bytes}",
        )
    return GateCheck("max_artifact_bytes", True, total_bytes, max_bytes, f"{total_bytes:,} bytes, limit {max_bytes:,}")


_CHANGE_OVERRIDE = "or build once with --no-change-limits"


def _change_rule_idle(rule: str, limit: float, baseline: Baseline | None) -> GateCheck | None:
    """The passing check of a rule on the change against the version in service when it cannot
    apply: turned off (limit 0), or no version in service; None when it applies."""
    if not limit:
        return GateCheck(rule, True, None, None, f"off (gate.{rule} = 0)")
    if baseline is None:
        return GateCheck(rule, True, None, None, "no version in service to compare with")
    return None


def _check_size_growth(total_bytes: int, limit: float, baseline: Baseline | None) -> GateCheck:
    if idle := _change_rule_idle("max_size_growth", limit, baseline):
        return idle
    growth = total_bytes / baseline.total_bytes - 1
    words = (
        f"the artifact has {total_bytes:,} bytes, {growth:+.1%} against version {baseline.version} "
        f"({baseline.total_bytes:,} bytes)"
    )
    if growth > limit:
        return GateCheck(
            "max_size_growth", False, growth, limit,
            f"{words}, over the allowed +{limit:.0%}; if the growth is expected, raise gate.max_size_growth "
            f"(0 turns the rule off) {_CHANGE_OVERRIDE}",
        )
    return GateCheck("max_size_growth", True, growth, limit, f"{words}, allowed +{limit:.0%}")


def _check_member_drop(members: int, limit: float, baseline: Baseline | None) -> GateCheck:
    if idle := _change_rule_idle("max_member_drop", limit, baseline):
        return idle
    ratio = members / baseline.members if baseline.members else 1.0
    drop, change = 1 - ratio, ratio - 1
    words = f"{members:,} members against {baseline.members:,} in version {baseline.version} ({change:+.1%})"
    if drop > limit:
        return GateCheck(
            "max_member_drop", False, drop, limit,
            f"{words}, a larger drop than the allowed {limit:.0%}: a truncated export would let every dropped member "
            f"through unchecked; if the drop is intended, raise gate.max_member_drop (0 turns the rule off) {_CHANGE_OVERRIDE}",
        )
    return GateCheck("max_member_drop", True, drop, limit, f"{words}, allowed drop {limit:.0%}")


@dataclass(frozen=True)
class PlainComparison:
    """The learned artifact against the plain filter it would replace: no model, one region holding
    every member, planned at the same aim so that the same held-out check would certify it. Both
    sizes are of the artifact files as written before verification (the measured figures then add
    the same few dozen header bytes to either)."""

    learned_bytes: int
    plain_bytes: int

    @property
    def model_pays(self) -> bool:
        """The model earns its bytes: the learned artifact is smaller than the plain one."""
        return self.learned_bytes < self.plain_bytes

    def as_report(self, policy: str, published_plain: bool) -> dict:
        return {
            "learned_bytes": self.learned_bytes,
            "plain_bytes": self.plain_bytes,
            "model_pays": self.model_pays,
            "when_model_does_not_pay": policy,
            "published": "plain" if published_plain else "learned",
        }


def publishes_plain(comparison: PlainComparison, policy: str) -> bool:
    """True when the plain filter ships instead of the learned artifact (gate.when_model_does_not_pay)."""
    return policy == "publish_plain" and not comparison.model_pays


def _check_model_pays(comparison: PlainComparison, policy: str) -> GateCheck:
    learned, plain = comparison.learned_bytes, comparison.plain_bytes
    ratio = learned / plain
    words = (
        f"the learned artifact takes {learned:,} bytes, {ratio - 1:+.1%} against {plain:,} for a plain filter "
        f"(no model) certified the same way"
    )
    if comparison.model_pays:
        return GateCheck("model_pays", True, ratio, 1.0, words)
    setting = f'gate.when_model_does_not_pay = "{policy}"'
    if policy == "refuse":
        return GateCheck("model_pays", False, ratio, 1.0,
                         f'{words}: the model does not pay; refused ({setting}; "publish_plain" publishes the plain filter)')
    if policy == "publish_plain":
        return GateCheck("model_pays", True, ratio, 1.0, f"{words}: the model does not pay; the plain filter is published ({setting})")
    return GateCheck("model_pays", True, ratio, 1.0,
                     f'{words}: the model does not pay; published anyway ({setting}; "publish_plain" publishes the plain filter)')


def gate_checks(
    verification: Verification,
    *,
    target: float,
    total_bytes: int,
    members: int,
    settings: GateSettings,
    baseline: Baseline | None,
    comparison: PlainComparison | None = None,
) -> list[GateCheck]:
    """Every gate rule checked after the artifact is written, in a fixed order (model_pays only
    when the plain filter was built to compare with)."""
    checks = [
        _check_false_negatives(verification),
        _check_answer_paths(verification.paths),
        _check_fpr_upper(verification, target, settings.fpr_slack),
        _check_artifact_bytes(total_bytes, settings.max_artifact_bytes),
        _check_size_growth(total_bytes, settings.max_size_growth, baseline),
        _check_member_drop(members, settings.max_member_drop, baseline),
    ]
    if comparison is not None:
        checks.append(_check_model_pays(comparison, settings.when_model_does_not_pay))
    return checks


def refusal_reasons(checks: list[GateCheck]) -> list[str]:
    """Why the gate refuses, one "rule: detail" line per failed rule; empty when it passes."""
    return [f"{check.rule}: {check.detail}" for check in checks if not check.passed]
