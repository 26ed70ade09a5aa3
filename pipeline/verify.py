"""Verify stage: reload the written artifact with the loader, check every member, bound the
false-positive rate the service will see, and decide the gate.

The rate is by lookups: tomorrow's non-member lookups are assumed to be drawn like the window's
(each lookup of key k with probability pi_k), and the artifact's rate is R = sum_k pi_k a_k, with
a_k = 1 when it answers "maybe" to non-member k. The window's counts c_k are that draw, L lookups in
all, so sum_k c_k a_k / L estimates R without bias whatever the law. Two strata carry it:

- heavy keys (window count at least tau): a take-all ("certainty") stratum, as in survey and audit
  sampling, where every unit above a size cutoff is examined and only the rest is sampled
  (W. G. Cochran, Sampling Techniques, 3rd ed., Wiley 1977, ch. 5 on stratification; recalled from
  memory). Every heavy key is answered on the written artifact, so its part of the sum is known;
  only its count is a draw (Poisson: variance about c_k).
- the tail: light keys (count below tau) and keys the window never saw. Light keys are split by a
  seeded hash; the held-out share s of their lookups estimates the tail's false-positive lookups
  as (held-out false-positive lookups) / s. Each held-out key adds a weight c_k / s below tau / s.

The upper bound treats the total as a weighted sum of Poisson counts and takes the gamma interval of
M. P. Fay and E. J. Feuer ("Confidence intervals for directly standardized rates: a method based on
the gamma distribution", Statistics in Medicine 16, 1997; the form below recalled from memory):
with total y, variance estimate v = sum of squared weights of the events, and w the largest weight
a unit can have, the upper limit of the mean is the `confidence` quantile of a gamma distribution of
shape (y + w)^2 / (v + w^2) and scale (v + w^2) / (y + w). The variance comes from the weights of
the keys that were false positives, so the bound stays valid when popularity and false positives
are correlated; with one lookup a key it is the exact Poisson (Garwood) bound. Its coverage is
checked by simulation in tests/test_coverage.py.

Gate rules (each refusal starts with the rule's name; the thresholds are `config.GateSettings`):

    min_heldout          before training: the held-out tail can bound the rate at the target at all
    false_negatives      every member answers "maybe", through every answer path of the loader
    answer_paths         the paths answer alike: every member and a sample of held-out keys
    fpr_upper            the rate's upper confidence bound <= target * (1 + fpr_slack)
    max_artifact_bytes   the artifact file is at most this large
    max_size_growth      at most this share more bytes than the version in service
    max_member_drop      at most this share fewer members than the version in service
    model_pays           the learned artifact is smaller than the plain filter it would replace; when
                         it is not, gate.when_model_does_not_pay says what happens (see `PlainComparison`)
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import tempfile
from dataclasses import dataclass

import numpy as np
from scipy import stats

from tamis import compiled
from tamis.config import GateSettings
from tamis.corpus import Corpus
from tamis.errors import BadInput
from tamis.loader import SINGLE_KEY_SUFFIX, MembershipFilter, answer_paths
from tamis.query import ANSWER_PATHS, pack_batch


def gamma_upper(total, variance, max_weight, confidence: float):
    """Fay and Feuer's upper confidence limit on the mean of a weighted sum of Poisson counts
    (see the module docstring); elementwise on arrays. With unit weights (total = variance = x,
    max_weight = 1) it is the exact Poisson bound, the `confidence` quantile of Gamma(x + 1)."""
    total, variance, weight = (np.asarray(a, dtype=np.float64) for a in (total, variance, max_weight))
    shape = (total + weight) ** 2 / (variance + weight**2)
    scale = (variance + weight**2) / (total + weight)
    return stats.gamma.ppf(confidence, shape, scale=scale)


def rate_upper(lookups, heavy_fp_lookups, tail_fp_lookups, tail_fp_squares, tail_sampled, tail_max_count, confidence: float):
    """The upper confidence bound on the lookup-weighted false-positive rate R from the strata's sums.

    `heavy_fp_lookups`: window lookups of heavy keys answered "maybe" (each a Poisson count);
    `tail_fp_lookups` and `tail_fp_squares`: sum of c and of c^2 over held-out light keys answered
    "maybe"; `tail_sampled`: the held-out share of the light keys' lookups (0 when the window has no
    light key); `tail_max_count`: the largest count of a light key. The tail's false-positive lookups
    are estimated as held-out ones / share, each key a weight c / share. Elementwise on arrays, so a
    simulation of many builds calls the very function the build calls.
    """
    sampled = np.asarray(tail_sampled, dtype=np.float64)
    inverse = np.divide(1.0, sampled, out=np.zeros_like(sampled), where=sampled > 0)
    total = heavy_fp_lookups + tail_fp_lookups * inverse
    variance = heavy_fp_lookups + tail_fp_squares * inverse**2
    weight = np.maximum(tail_max_count * inverse, 1.0)
    return np.minimum(gamma_upper(total, variance, weight, confidence) / lookups, 1.0)


def effective_sample_size(weights: np.ndarray) -> float:
    """Kish's effective sample size (sum w)^2 / sum w^2 of a weighted sample (L. Kish, Survey
    Sampling, 1965): how many unweighted draws carry the same information as these weighted ones."""
    w = weights.astype(np.float64)
    square_sum = float(np.dot(w, w))
    return float(w.sum()) ** 2 / square_sum if square_sum else 0.0


@dataclass(frozen=True)
class Strata:
    """The window as the bound sees it: the cutoff tau, all non-member lookups, the heavy keys'
    counts, the light keys' lookups (every part) and largest count, the held-out light keys' counts."""

    tau: int
    lookups: int
    heavy_counts: np.ndarray
    tail_lookups: int
    tail_max_count: int
    heldout_counts: np.ndarray

    @property
    def heavy_lookups(self) -> int:
        return int(self.heavy_counts.sum())

    @property
    def heldout_lookups(self) -> int:
        return int(self.heldout_counts.sum())

    @property
    def tail_sampled(self) -> float:
        """The held-out share of the light keys' lookups."""
        return self.heldout_lookups / self.tail_lookups if self.tail_lookups else 0.0

    @property
    def heaviest_weight(self) -> float:
        """The largest weight a held-out key can carry in the tail's estimate (at least 1)."""
        return max(self.tail_max_count / self.tail_sampled, 1.0) if self.tail_sampled else 1.0


def strata_of(corpus: Corpus) -> Strata:
    light = [part.counts for part in corpus.non_member_parts[1:]]
    return Strata(
        tau=corpus.tau,
        lookups=corpus.lookups,
        heavy_counts=corpus.heavy.counts,
        tail_lookups=int(sum(int(c.sum()) for c in light)),
        tail_max_count=int(max((int(c.max()) for c in light if len(c)), default=0)),
        heldout_counts=corpus.heldout.counts,
    )


@dataclass(frozen=True)
class Measurement:
    """The false-positive rate of one artifact on one corpus, by stratum.

    keys / lookups / false_positive_*: the held-out light keys (the tail's sample) and those
    answered maybe; heavy_*: the take-all stratum; fpr: the estimate of R, (heavy false-positive
    lookups + tail ones / share) / all lookups; fpr_upper: its upper bound at `confidence`;
    tail_fpr / tail_fpr_upper: the tail's own rate and bound; effective_sample: Kish's size of
    the held-out light keys' counts.
    """

    confidence: float
    tau: int
    total_lookups: int
    heavy_keys: int
    heavy_lookups: int
    heavy_false_positive_keys: int
    heavy_false_positive_lookups: int
    keys: int
    lookups: int
    false_positive_keys: int
    false_positive_lookups: int
    tail_lookups: int
    tail_fpr: float
    tail_fpr_upper: float
    effective_sample: float
    fpr: float
    fpr_upper: float

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

    def strata_report(self) -> dict:
        """The two strata, as report.json's `strata` shows them."""
        total = self.total_lookups
        return {
            "tau": self.tau,
            "lookups": total,
            "heavy_keys": self.heavy_keys,
            "heavy_lookups": self.heavy_lookups,
            "heavy_share": self.heavy_lookups / total if total else 0.0,
            "heavy_false_positive_keys": self.heavy_false_positive_keys,
            "heavy_false_positive_lookups": self.heavy_false_positive_lookups,
            "heavy_false_positive_share": self.heavy_false_positive_lookups / total if total else 0.0,
            "tail_lookups": self.tail_lookups,
            "tail_share": self.tail_lookups / total if total else 0.0,
            "tail_heldout_keys": self.keys,
            "tail_heldout_lookups": self.lookups,
            "tail_effective_sample": self.effective_sample,
            "tail_fpr": self.tail_fpr,
            "tail_fpr_upper": self.tail_fpr_upper,
            "confidence": self.confidence,
        }


def measure(heavy_answers: np.ndarray, heldout_answers: np.ndarray, strata: Strata, confidence: float) -> Measurement:
    """The rate of an artifact from its answers (True = maybe) to every heavy key and every
    held-out light key. Without lookup counts every count is 1 and this is the rate by keys."""
    heavy_fp = strata.heavy_counts[heavy_answers]
    tail_fp = strata.heldout_counts[heldout_answers].astype(np.float64)
    heavy_fp_lookups, tail_fp_lookups = int(heavy_fp.sum()), int(tail_fp.sum())
    squares = float(np.dot(tail_fp, tail_fp))
    sampled = strata.tail_sampled
    tail_estimate = tail_fp_lookups / sampled if sampled else 0.0
    tail_upper = rate_upper(strata.tail_lookups, 0, tail_fp_lookups, squares, sampled, strata.tail_max_count, confidence) if strata.tail_lookups else 0.0
    return Measurement(
        confidence=confidence,
        tau=strata.tau,
        total_lookups=strata.lookups,
        heavy_keys=len(strata.heavy_counts),
        heavy_lookups=strata.heavy_lookups,
        heavy_false_positive_keys=len(heavy_fp),
        heavy_false_positive_lookups=heavy_fp_lookups,
        keys=len(heldout_answers),
        lookups=strata.heldout_lookups,
        false_positive_keys=int(np.count_nonzero(heldout_answers)),
        false_positive_lookups=tail_fp_lookups,
        tail_lookups=strata.tail_lookups,
        tail_fpr=tail_fp_lookups / strata.heldout_lookups if strata.heldout_lookups else 0.0,
        tail_fpr_upper=float(tail_upper),
        effective_sample=effective_sample_size(strata.heldout_counts),
        fpr=(heavy_fp_lookups + tail_estimate) / strata.lookups,
        fpr_upper=float(rate_upper(strata.lookups, heavy_fp_lookups, tail_fp_lookups, squares, sampled, strata.tail_max_count, confidence)),
    )


def aim_fpr(
    target: float,
    strata: Strata,
    validation_counts: np.ndarray,
    confidence: float,
    aim_sigmas: float,
    seed_candidates: int = 1,
) -> float:
    """The rate to plan for so that a build hitting it passes the gate with high probability.

    Planned at rate f (the same chance for every key), the gate sees a total of about f L
    false-positive lookups, with variance f V_gate (heavy counts' Poisson noise plus the held-out
    tail's weights: V_gate = heavy lookups + sum of held-out c^2 / s^2). The plan's own rate is
    itself uncertain: the tail's share is estimated on `validation_counts`, the keys that pin the
    plan's rate (the check keys, `tamis.planning`; f times sum of their c^2 / s_val^2), and each heavy key is a false positive by the luck of hashing (f (1 - f) sum of heavy
    c^2). In all but the unluckiest builds the total stays below f L + s sqrt(those variances), where
    s = `aim_sigmas` for the sampling terms; when the build picks each region's hash seed among
    `seed_candidates` to spare the heavy keys, the luck term takes the quantile of the best of them
    (it only shrinks). Plan for the largest f whose unlucky total still has a bound at most the
    target; both sides grow with f, so bisection finds it.
    """
    plan_unit = _plan_unit(strata, validation_counts)
    luck_unit = float(np.dot(strata.heavy_counts.astype(np.float64), strata.heavy_counts))
    luck_sigmas = best_of_quantile(aim_sigmas, seed_candidates)
    gate_unit = _gate_unit(strata)

    def passes(f: float) -> bool:
        luck = luck_sigmas * math.sqrt(f * (1 - f) * luck_unit)
        return _unlucky_bound(f * strata.lookups, f * gate_unit, f * plan_unit, luck, aim_sigmas, strata, confidence) <= target

    return _largest_passing(passes, target)


def tail_allowance(
    target: float, strata: Strata, check_counts: np.ndarray, confidence: float, aim_sigmas: float, heavy_fp_lookups: float
) -> float | None:
    """The largest lookup-weighted rate of the tail a build may have once its filters are built and
    its heavy keys' false-positive lookups are known exactly (`heavy_fp_lookups`), so that it passes
    the gate as often as `aim_fpr` promises; None when the heavy keys alone leave no room.

    The same reckoning as `aim_fpr` with the heavy stratum fixed: the gate sees heavy_fp + t T
    false-positive lookups (T the tail's lookups) with variance heavy_fp + t V_tail, the check
    keys that pin t add t V_check, and the heavy keys' luck of hashing is spent (no luck term).
    """
    tail_unit = _gate_unit(strata) - strata.heavy_lookups
    plan_unit = _plan_unit(strata, check_counts)

    def passes(t: float) -> bool:
        expected = heavy_fp_lookups + t * strata.tail_lookups
        return _unlucky_bound(expected, heavy_fp_lookups + t * tail_unit, t * plan_unit, 0.0, aim_sigmas, strata, confidence) <= target

    if not passes(0.0):
        return None
    return _largest_passing(passes, 1.0)


def outcome_headroom(
    target: float, strata: Strata, check_counts: np.ndarray, confidence: float, aim_sigmas: float, heavy_fp_lookups: float,
    tail_rate: float,
) -> float:
    """The largest factor s by which a built outcome (heavy false-positive lookups, tail rate) could
    grow, both together, and still pass as `tail_allowance` reckons: where the next plan should be
    made, relative to this one, whichever stratum carries the rate (up to 2^20)."""
    tail_unit = _gate_unit(strata) - strata.heavy_lookups
    plan_unit = _plan_unit(strata, check_counts)

    def passes(scale: float) -> bool:
        heavy, tail = scale * heavy_fp_lookups, min(scale * tail_rate, 1.0)
        expected = heavy + tail * strata.tail_lookups
        return _unlucky_bound(expected, heavy + tail * tail_unit, tail * plan_unit, 0.0, aim_sigmas, strata, confidence) <= target

    return _largest_passing(passes, float(1 << 20))


def _gate_unit(strata: Strata) -> float:
    """The gate's variance per unit of rate: heavy lookups (Poisson) plus the held-out tail's
    weights, sum of held-out c^2 / s^2."""
    share = strata.tail_sampled
    heldout = strata.heldout_counts.astype(np.float64)
    return strata.heavy_lookups + (float(np.dot(heldout, heldout)) / share**2 if share else 0.0)


def _plan_unit(strata: Strata, validation_counts: np.ndarray) -> float:
    """The variance per unit of rate of the tail's rate estimated on `validation_counts` (the check keys)."""
    share = float(validation_counts.sum()) / strata.tail_lookups if strata.tail_lookups else 0.0
    validation = validation_counts.astype(np.float64)
    return float(np.dot(validation, validation)) / share**2 if share else 0.0


def _unlucky_bound(expected: float, gate_variance: float, plan_variance: float, luck: float, sigmas: float,
                   strata: Strata, confidence: float) -> float:
    """The gate's bound on a build that lands `sigmas` standard deviations (and `luck`) above its
    expected false-positive lookups; the gate's variance grows with the total as a Poisson's would."""
    unlucky = expected + sigmas * math.sqrt(gate_variance + plan_variance) + luck
    variance = gate_variance * unlucky / expected if expected > 0 else gate_variance
    return float(gamma_upper(unlucky, variance, strata.heaviest_weight, confidence)) / strata.lookups


def _largest_passing(passes, high: float) -> float:
    """The largest rate in [0, high] that passes (to 2^-50 of high), for a test monotone in the rate."""
    low = 0.0
    for _ in range(50):
        mid = (low + high) / 2
        low, high = (mid, high) if passes(mid) else (low, mid)
    return low


def best_of_quantile(sigmas: float, candidates: int) -> float:
    """The level, in standard deviations, that the least of `candidates` independent normal draws
    exceeds no more often than one draw exceeds `sigmas`: P(all above x) = P(one above sigmas)
    gives x = Phi^-1(1 - p^(1/m)). Never below 0 (the aim takes no credit for the choice)."""
    tail = stats.norm.sf(sigmas) ** (1.0 / candidates)
    return max(0.0, float(stats.norm.isf(tail)))


def needed_heldout_lookups(strata: Strata, target: float, confidence: float) -> float:
    """The fewest held-out light lookups for which a tail without a false positive bounds the rate
    below the target: the bound of no event is -ln(1 - c) times the heaviest weight, tail_max_count
    times tail lookups over held-out lookups, which must be at most target x lookups."""
    if not strata.tail_lookups:
        return 0.0
    return -math.log1p(-confidence) * strata.tail_max_count * strata.tail_lookups / (target * strata.lookups)


def require_heldout(strata: Strata, target: float, settings: GateSettings, heldout_share: float) -> None:
    """Rule min_heldout, before any training: stop with BadInput when the held-out tail is too
    small to show that the target is met. The heavy keys need no holding out; only the tail is asked."""
    needed = needed_heldout_lookups(strata, target, settings.confidence)
    have = strata.heldout_lookups
    sample = effective_sample_size(strata.heldout_counts)
    if have >= needed and sample >= settings.min_heldout:
        return
    problems = []
    if have < needed:
        problems.append(
            f"a target of {target:.4%} at {settings.confidence:.0%} confidence needs at least {math.ceil(needed):,} "
            f"held-out tail lookups (with fewer, even a tail without a false positive cannot be shown to meet it; "
            f"the largest light count is {strata.tail_max_count:,}): about {needed / max(have, 1):,.1f} times as much log"
        )
    if sample < settings.min_heldout:
        problems.append(f"gate.min_heldout asks for an effective sample of {settings.min_heldout:,} held-out tail draws")
    raise BadInput(
        f"min_heldout: the tail (keys looked up fewer than tau = {strata.tau:,} times) has {len(strata.heldout_counts):,} "
        f"held-out keys with {have:,} lookups (effective sample {sample:,.1f}); " + "; and ".join(problems)
        + f". To fix: give a longer lookup log (more non-members), raise corpus.heldout_share (now {heldout_share:g}), "
        f"lower corpus.heavy_count (keys at or above it are answered exactly, not sampled), or raise the target"
    )


# Held-out keys answered through every answer path (all of them answer through the service's own
# path for the rate): a path that differs on a share p of non-members shows in the sample with
# probability 1 - (1 - p)^100,000, 99.995% for p = 0.01%. Every member goes through every path.
PATH_SAMPLE_KEYS = 100_000


def path_sample(keys: list[bytes]) -> list[bytes]:
    """At most PATH_SAMPLE_KEYS of `keys`, evenly spaced, to answer through every answer path."""
    return keys[:: max(1, -(-len(keys) // PATH_SAMPLE_KEYS))]


# The numpy single-key path is plain Python, a key at a time, and holds the interpreter's lock, so
# beside the build's other threads it runs alone: for at least this many keys it runs in a Python
# process of its own (the same code on the same file, `WORKER`), beside the other paths.
WORKER_PROCESS_KEYS = 50_000
NUMPY_SINGLE = ANSWER_PATHS[0] + SINGLE_KEY_SUFFIX
# argv: artifact, answer path, a file of the keys (int64 count, int64 offsets, the bytes); writes
# one byte an answer.
WORKER = """
import sys
import numpy as np
from tamis.loader import open_filter
raw = open(sys.argv[3], "rb").read()
count = int(np.frombuffer(raw, np.int64, 1)[0])
bounds = np.frombuffer(raw, np.int64, count + 1, 8).tolist()
data = raw[8 * (count + 2):]
keys = [data[a:b] for a, b in zip(bounds, bounds[1:])]
answers = open_filter(sys.argv[1], answer_path="numpy").answers_through(sys.argv[2], keys)
sys.stdout.buffer.write(answers.astype(np.uint8).tobytes())
"""


def _in_worker(loaded: MembershipFilter, path: str, keys: list[bytes], folder: str) -> subprocess.Popen:
    """Start a Python process answering `keys` through the answer path `path` of `loaded`'s file."""
    packed = pack_batch(keys)
    listing = os.path.join(folder, "keys")
    with open(listing, "wb") as handle:
        handle.write(np.int64(len(keys)).tobytes() + packed.offsets.astype(np.int64).tobytes() + packed.buffer)
    return subprocess.Popen([sys.executable, "-c", WORKER, str(loaded.path), path, listing],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)


def every_path_answers(loaded: MembershipFilter, keys: list[bytes]) -> np.ndarray:
    """Each key's answer through each answer path of the loader, (keys, paths) in `answer_paths()`
    order; the numpy single-key path in a worker process for many keys (WORKER_PROCESS_KEYS)."""
    if len(keys) < WORKER_PROCESS_KEYS:
        return np.column_stack([loaded.answers_through(path, keys) for path in answer_paths()]).reshape(len(keys), -1)
    with tempfile.TemporaryDirectory(prefix="tamis-verify-") as folder:
        worker = _in_worker(loaded, NUMPY_SINGLE, keys, folder)
        answers = {path: loaded.answers_through(path, keys) for path in answer_paths() if path != NUMPY_SINGLE}
        out, err = worker.communicate()
    if worker.returncode != 0 or len(out) != len(keys):
        raise RuntimeError(f"the {NUMPY_SINGLE} answers of {loaded.path} could not be computed in a worker process "
                           f"(exit {worker.returncode}): {err.decode(errors='replace')[-2000:]}")
    answers[NUMPY_SINGLE] = np.frombuffer(out, dtype=np.uint8).astype(bool)
    return np.column_stack([answers[path] for path in answer_paths()]).reshape(len(keys), -1)


@dataclass(frozen=True)
class PathAgreement:
    """Members and sampled non-members answered through every answer path, and how many of each got
    different answers from two paths."""

    paths: tuple[str, ...]
    members: int
    nonmembers: int
    members_differing: int
    nonmembers_differing: int

    @property
    def query_paths(self) -> tuple[str, ...]:
        """The query paths ("numpy", "compiled") whose batch and single-key calls were both checked:
        what the artifact records as verified (`tamis.format.VERIFIED_PATHS_FIELD`)."""
        return tuple(name for name in ANSWER_PATHS if name in self.paths and name + SINGLE_KEY_SUFFIX in self.paths)

    @property
    def not_verified(self) -> dict[str, str]:
        """Each query path left unchecked, and why (a service with numba answers such an artifact on
        the numpy path)."""
        return {name: compiled.DISABLED_BECAUSE or "not run" for name in ANSWER_PATHS if name not in self.query_paths}

    def as_report(self) -> dict:
        return {"paths": list(self.paths), "members": self.members, "nonmembers": self.nonmembers,
                "members_differing": self.members_differing, "nonmembers_differing": self.nonmembers_differing,
                "verified_paths": list(self.query_paths), "not_verified": self.not_verified}


def _differing(answers: np.ndarray) -> int:
    return int(np.count_nonzero(answers.any(axis=1) != answers.all(axis=1)))


@dataclass(frozen=True)
class Verification:
    """`by_region`: per region, the held-out light keys there, their lookups and the lookups
    answered "maybe" (`RegionMeasurement`), when the regions of the held-out keys were given."""

    false_negatives: int
    members_checked: int
    heldout: Measurement
    paths: PathAgreement
    by_region: tuple[RegionMeasurement, ...] = ()


@dataclass(frozen=True)
class RegionMeasurement:
    """One region's held-out light keys: how many, their lookups, and the lookups answered "maybe"."""

    keys: int
    lookups: int
    false_positive_lookups: int

    @property
    def fpr(self) -> float | None:
        return self.false_positive_lookups / self.lookups if self.lookups else None


def by_region(heldout_answers: np.ndarray, heldout_regions: np.ndarray, counts: np.ndarray, regions: int) -> tuple[RegionMeasurement, ...]:
    """Each region's held-out keys, lookups and lookups answered maybe."""
    keys = np.bincount(heldout_regions, minlength=regions)
    lookups = np.bincount(heldout_regions, weights=counts, minlength=regions)
    hits = np.bincount(heldout_regions, weights=counts * heldout_answers, minlength=regions)
    return tuple(RegionMeasurement(int(k), int(n), int(h)) for k, n, h in zip(keys, lookups, hits))


def verification(member_answers: np.ndarray, sample_answers: np.ndarray, heavy_answers: np.ndarray,
                 heldout_answers: np.ndarray, strata: Strata, confidence: float,
                 heldout_regions: np.ndarray | None = None, regions: int = 0) -> Verification:
    """The verdict on a filter from its answers: to every member and to a sample of held-out keys
    through every answer path ((keys, paths), `every_path_answers`), and to every heavy key and
    every held-out light key through the service's path. A member is a false negative when any
    path answers it "no". With `heldout_regions` (each held-out key's region of `regions`), the
    held-out rate is also measured region by region."""
    if member_answers.shape[1:] != (len(answer_paths()),):  # e.g. cluster workers without numba
        raise BadInput(f"the verify tasks answered through {member_answers.shape[1:]} paths, this process has "
                       f"{len(answer_paths())} ({', '.join(answer_paths())}): install the same extras (fast: numba) "
                       f"where the tasks run as here, so that every path recorded as verified was")
    false_negatives = int(len(member_answers) - np.count_nonzero(member_answers.all(axis=1)))
    paths = PathAgreement(answer_paths(), len(member_answers), len(sample_answers),
                          _differing(member_answers), _differing(sample_answers))
    regional = () if heldout_regions is None else by_region(heldout_answers, heldout_regions, strata.heldout_counts, regions)
    return Verification(false_negatives, len(member_answers), measure(heavy_answers, heldout_answers, strata, confidence), paths,
                        regional)


def check_filter(loaded: MembershipFilter, corpus: Corpus, confidence: float) -> Verification:
    """Query every member and a sample of held-out keys through every answer path of an opened
    filter, and every heavy and held-out key through `contains_many`."""
    return verification(
        every_path_answers(loaded, corpus.members),
        every_path_answers(loaded, path_sample(corpus.heldout.keys)),
        loaded.contains_many(corpus.heavy.keys),
        loaded.contains_many(corpus.heldout.keys),
        strata_of(corpus),
        confidence,
    )


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


@dataclass(frozen=True)
class PlanFigures:
    """What the build planned, for the gate's advice: the aim it planned for, the settled plan's own
    estimate of its built filters and what their heavy outcome allowed (None: nothing did,
    `tamis.planning`)."""

    aim: float
    estimate: float
    allowed: float | None


def _check_fpr_upper(verification: Verification, target: float, settings: GateSettings, plan: PlanFigures | None) -> GateCheck:
    held = verification.heldout
    limit = target * (1 + settings.fpr_slack)
    words = f"the rate's {held.confidence:.0%} upper bound {held.fpr_upper:.4%} (heavy keys exact, the tail bounded)"
    if held.fpr_upper > limit:
        return GateCheck("fpr_upper", False, held.fpr_upper, limit,
                         f"{words} is above the allowed {limit:.4%}; {fpr_advice(held, limit, settings, plan)}")
    return GateCheck("fpr_upper", True, held.fpr_upper, limit, f"{words} is within the allowed {limit:.4%}")


def fpr_advice(held: Measurement, limit: float, settings: GateSettings, plan: PlanFigures | None) -> str:
    """What to change when rule fpr_upper refuses: the aim, the plan's estimate and the measured
    rate side by side, then the settings that would have passed."""
    if plan is None:
        return f"measured {held.fpr:.4%}; plan for a lower rate (raise gate.aim_sigmas from {settings.aim_sigmas:g})"
    allowed = "nothing (the heavy keys alone)" if plan.allowed is None else f"{plan.allowed:.4%}"
    side = f"aim {plan.aim:.4%}, plan estimate {plan.estimate:.4%} (allowed {allowed}), measured {held.fpr:.4%}"
    ways = []
    if plan.allowed is None or plan.estimate > plan.allowed:
        ways.append("a cap on every region's rate (regions.max_region_fpr, e.g. 0.5) so that no heavy key lands in a region "
                    "answering yes, or the plain filter (gate.when_model_does_not_pay = \"publish_plain\")")
    if held.fpr > plan.estimate:
        ways.append(f"a lower aim: the held-out keys measured {held.fpr / plan.estimate:.2f}x the plan's estimate, so plan "
                    f"near {plan.aim * limit / held.fpr_upper:.4%} (raise gate.aim_sigmas from {settings.aim_sigmas:g})")
    if held.fpr <= limit:
        ways.append(f"a tighter bound: the measured rate is within the allowed {limit:.4%} but the tail's sampling adds "
                    f"{held.fpr_upper - held.fpr:.4%}; more held-out lookups (raise corpus.heldout_share) narrow it, or "
                    f"gate.fpr_slack = {held.fpr_upper / limit * (1 + settings.fpr_slack) - 1:.3f} accepts this bound")
    return f"{side}; would pass with {'; or '.join(ways) if ways else 'a lower aim (raise gate.aim_sigmas)'}"


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
    plan: PlanFigures | None = None,
    unlike: tuple[str, float] | None = None,
) -> list[GateCheck]:
    """Every gate rule checked after the artifact is written, in a fixed order (model_pays only
    when the plain filter was built to compare with); `plan` words the advice of a refusal by
    fpr_upper."""
    checks = [
        _check_false_negatives(verification),
        _check_answer_paths(verification.paths),
        _check_fpr_upper(verification, target, settings, plan),
        _check_artifact_bytes(total_bytes, settings.max_artifact_bytes),
        _check_size_growth(total_bytes, settings.max_size_growth, baseline),
        _check_member_drop(members, settings.max_member_drop, baseline),
    ]
    if unlike is not None:
        checks.append(_check_unlike_rate(*unlike, settings.max_unlike_rate))
    if comparison is not None:
        checks.append(_check_model_pays(comparison, settings.when_model_does_not_pay))
    return checks


def _check_unlike_rate(family: str, rate: float, limit: float) -> GateCheck:
    """Rule max_unlike_rate: the worst family of keys unlike the sample (`tamis.probes`)."""
    if not limit:
        return GateCheck("max_unlike_rate", True, rate, None,
                         f"off (gate.max_unlike_rate = 0); the worst family, {family}, is answered maybe {rate:.2%}")
    if rate > limit:
        return GateCheck("max_unlike_rate", False, rate, limit,
                         f"keys unlike the sample ({family}) are answered maybe {rate:.2%}, over the limit of {limit:.2%}; "
                         f"cap the regions (regions.max_region_fpr, at most the limit) or rebuild from a sample holding such keys")
    return GateCheck("max_unlike_rate", True, rate, limit, f"worst family {family} at {rate:.2%}, limit {limit:.2%}")


def refusal_reasons(checks: list[GateCheck]) -> list[str]:
    """Why the gate refuses, one "rule: detail" line per failed rule; empty when it passes."""
    return [f"{check.rule}: {check.detail}" for check in checks if not check.passed]
