"""Verify stage: reload the written artifact with the loader, check every member, measure the
false-positive rate on held-out non-members, and decide the gate.

The held-out keys were never used for training, model choice or region choice (invariant 3), so the
rate measured here is an honest estimate of the rate the service will see on lookups drawn like them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import stats

from pipeline.corpus import KeySet
from pipeline.loader import open_filter


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


def aim_fpr(target: float, effective_sample: float, confidence: float, aim_sigmas: float) -> float:
    """The rate to plan for so that a build hitting it passes the gate with high probability.

    On n draws a true rate f gives about f n false positives, and up to x(f) = f n + s sqrt(f (1-f) n)
    in all but the unluckiest builds (s = `aim_sigmas` standard deviations). Plan for the largest f
    whose x(f) still has a Clopper-Pearson upper bound at most the target; both sides grow with f, so
    bisection finds it.
    """
    n = effective_sample

    def passes(f: float) -> bool:
        unlucky = f * n + aim_sigmas * math.sqrt(f * (1 - f) * n)
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


@dataclass(frozen=True)
class Verification:
    false_negatives: int
    members_checked: int
    heldout: Measurement


def verify_artifact(path: Path, members: list[bytes], heldout: KeySet, weighted: bool, confidence: float) -> Verification:
    """Open `path` with the loader a service uses; query every member and every held-out key."""
    loaded = open_filter(path)
    member_answers = loaded.contains_many(members)
    false_negatives = int(len(members) - member_answers.sum())
    measurement = measure_fpr(loaded.contains_many(heldout.keys), heldout, weighted, confidence)
    return Verification(false_negatives, len(members), measurement)


def gate_reasons(verification: Verification, target: float, fpr_slack: float, total_bytes: int, max_bytes: int) -> list[str]:
    """Why the gate refuses the artifact; an empty list means it passes."""
    reasons = []
    if verification.false_negatives:
        reasons.append(f"false_negatives: {verification.false_negatives} members answered no")
    limit = target * (1 + fpr_slack)
    if verification.heldout.fpr_upper > limit:
        reasons.append(
            f"fpr_upper: the held-out rate's {verification.heldout.confidence:.0%} upper bound "
            f"{verification.heldout.fpr_upper:.4%} is above the allowed {limit:.4%}"
        )
    if max_bytes and total_bytes > max_bytes:
        reasons.append(f"max_artifact_bytes: the artifact has {total_bytes} bytes, over the limit of {max_bytes}")
    return reasons
