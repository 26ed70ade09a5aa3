"""Planning stage: the region plan that gets built, settled on the rates of its built filters.

The region plan (`tamis.regions.plan_regions`) is made for a rate with the filters' sizing
formulas. What the gate will see depends on the filters actually built: each region's rate for
random keys (`tamis.filters.region_rate`: exact for Bloom filters, 2^-r for fuse, 0 or 1 for
constant regions) and, for the heavy keys, which ones the chosen variants answer "maybe", known
exactly once the filters are built. `settle_plan` therefore plans, builds, and estimates:

    estimate = (heavy false-positive lookups + T x tail rate) / L

with the tail rate the check keys' lookup-weighted mean of their regions' rates (T the tail's
lookups, L all lookups). The estimate is held against the allowance for that very heavy outcome
(`tamis.verify.tail_allowance`: the same chance of passing the gate as the aim promises, with the
heavy keys' luck already spent), and the plan is made again at its rate times the factor by which
this outcome, heavy and tail together, could grow and still pass (`tamis.verify.outcome_headroom`:
the heavy stratum carries the rate on some corpora, the tail on others) until it fits with less
than PLAN_CLOSE of room, at most PLAN_ROUNDS plans (MAX_PLAN_ROUNDS
while none fits). Of the plans
whose estimate is within their allowance, the one with the fewest bytes is built; a plan above its
allowance is never chosen while one within it exists. The check keys took no part in the model's
choice, the boundaries or the budgets, and the held-out keys the gate measures take part in
nothing here.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from tamis import corpus as corpus_stage
from tamis import verify
from tamis.bloom import hash_keys
from tamis.config import BuildConfig
from tamis.filters import RegionFilter, empty_filters, region_rate
from tamis.hot_keys import Sparing, spare_heavy_keys
from tamis.query import region_of
from tamis.regions import RegionPlan, plan_regions
from tamis.sizing import SECTION_BYTES

# The largest rate a plan may be made for (plan_regions takes rates below 1).
MAX_PLANNED_RATE = 0.5
# Plans made, built and estimated at most (the first included); each costs one region plan and
# one insertion of every member (about a second on the demo).
PLAN_ROUNDS = 4
# ... and while none of them fits its allowance, up to this many (then the last is built, and the
# gate's refusal says by how much it missed).
MAX_PLAN_ROUNDS = 8
# A plan within its allowance whose outcome could grow by less than this share is close enough.
PLAN_CLOSE = 0.02
# The next plan is made at no less than this share of the last one's rate.
PLAN_SHRINK = 0.5


@dataclass(frozen=True)
class PlanScores:
    """The model's scores of the members and of the non-members the plan sees: validation keys,
    check keys (they estimate the plan's tail) and heavy keys, with the plan's weights of the
    validation then heavy keys (`tamis.corpus.plan_weights`)."""

    members: np.ndarray
    validation: np.ndarray
    check: np.ndarray
    heavy: np.ndarray
    weights: np.ndarray

    @property
    def nonmembers(self) -> np.ndarray:
        """Validation then heavy keys' scores, in the order of `weights`."""
        return np.concatenate([self.validation, self.heavy])


@dataclass(frozen=True)
class PlanRound:
    """One plan made, built and estimated: the rate it was made for, its estimate, what its heavy
    outcome allows, its bytes (filters, section entries and region overheads)."""

    rate: float
    estimate: float
    allowed: float | None
    bytes: int

    @property
    def fits(self) -> bool:
        return self.allowed is not None and self.estimate <= self.allowed

    def as_report(self) -> dict:
        return {"rate": self.rate, "estimate": self.estimate, "allowed": self.allowed, "bytes": self.bytes}


@dataclass(frozen=True)
class SettledPlan:
    """The plan chosen, its filters (members inserted) and variants, each region's rate as built,
    and every round that led to it (the chosen one is `rounds[chosen]`)."""

    plan: RegionPlan
    filters: list[RegionFilter]
    sparing: Sparing
    rates: list[float]
    rounds: list[PlanRound]
    chosen: int

    @property
    def estimate(self) -> float:
        return self.rounds[self.chosen].estimate

    @property
    def allowed(self) -> float | None:
        return self.rounds[self.chosen].allowed

    def as_report(self) -> dict:
        return {"chosen": self.chosen, "rounds": [r.as_report() for r in self.rounds]}


# Fills a plan's filters (bits still clear, variants chosen) with their members.
Fill = Callable[[RegionPlan, list[RegionFilter]], list[RegionFilter]]


def training_keys(corpus: corpus_stage.Corpus, config: BuildConfig) -> corpus_stage.KeySet:
    """The light training keys that train, with room left in model.train_nonmembers for every
    heavy key (they all train, after these)."""
    room = max(config.model.train_nonmembers - len(corpus.heavy.keys), 1)
    return corpus_stage.sample_keys(corpus.train, room, config.model.seed)


def spare_filters(corpus: corpus_stage.Corpus, member_scores: np.ndarray, heavy_scores: np.ndarray, plan: RegionPlan,
                  config: BuildConfig) -> Sparing:
    """The region filters, bits still clear, in the variants that answer the fewest heavy lookups
    maybe (`tamis.hot_keys`)."""
    regions = region_of(member_scores, plan.boundaries)
    seed = config.filters.hash_seed
    return spare_heavy_keys(empty_filters(regions, plan.filters, seed), corpus.members, regions, corpus.heavy.keys,
                            corpus.heavy.counts, region_of(heavy_scores, plan.boundaries), seed, config.filters.variants)


def heavy_false_positive_lookups(filters: list[RegionFilter], corpus: corpus_stage.Corpus, heavy_regions: np.ndarray,
                                 hash_seed: int) -> int:
    """Window lookups of heavy keys that the built filters answer "maybe" (exact)."""
    answers = np.zeros(len(corpus.heavy.keys), dtype=bool)
    hashes = hash_keys(corpus.heavy.keys, hash_seed)
    for index, region in enumerate(filters):
        mine = heavy_regions == index
        if mine.any():
            answers[mine] = region.query_hashes(hashes.select(mine), hash_seed)
    return int(corpus.heavy.counts[answers].sum())


def plan_bytes(plan: RegionPlan, filters: list[RegionFilter], config: BuildConfig) -> int:
    """The bytes a plan's built filters add to the artifact: their words, a section entry each
    (`tamis.sizing.SECTION_BYTES`) and the region overhead of every region."""
    stored = sum(f.nbytes + SECTION_BYTES for f in filters if f.mode in ("bloom", "fuse"))
    return stored + len(filters) * config.regions.region_overhead_bytes


def settle_plan(scores: PlanScores, corpus: corpus_stage.Corpus, aim: float, config: BuildConfig, fill: Fill) -> SettledPlan:
    """The plan to build, first made at `aim`, then settled on its built filters' rates (module docstring)."""
    strata = verify.strata_of(corpus)
    check_counts = corpus.check.counts.astype(np.float64)
    seed = config.filters.hash_seed
    rate, rounds, built = aim, [], []
    while True:
        plan = plan_regions(scores.members, scores.nonmembers, scores.weights, rate, config.regions)
        sparing = spare_filters(corpus, scores.members, scores.heavy, plan, config)
        filters = fill(plan, sparing.filters)
        rates = np.array([region_rate(f) for f in filters])
        heavy_fp = heavy_false_positive_lookups(filters, corpus, region_of(scores.heavy, plan.boundaries), seed)
        checked = check_counts.sum()
        tail = float(check_counts @ rates[region_of(scores.check, plan.boundaries)]) / checked if checked else 0.0
        allowance = verify.tail_allowance(config.target.fpr, strata, corpus.check.counts, config.gate.confidence,
                                          config.gate.aim_sigmas, heavy_fp)
        estimate = (heavy_fp + strata.tail_lookups * tail) / strata.lookups
        allowed = None if allowance is None else (heavy_fp + strata.tail_lookups * allowance) / strata.lookups
        rounds.append(PlanRound(rate, estimate, allowed, plan_bytes(plan, filters, config)))
        built.append((plan, filters, sparing, rates.tolist()))
        this = rounds[-1]
        # the factor by which this outcome, heavy and tail grown together, could grow and still pass
        headroom = verify.outcome_headroom(config.target.fpr, strata, corpus.check.counts, config.gate.confidence,
                                           config.gate.aim_sigmas, heavy_fp, tail)
        if this.fits and headroom < 1 + PLAN_CLOSE or this.estimate == 0:
            break
        if len(rounds) >= MAX_PLAN_ROUNDS or len(rounds) >= PLAN_ROUNDS and any(r.fits for r in rounds):
            break
        # the next plan where this outcome would just pass (half of PLAN_CLOSE under, so that a plan
        # landing near it still fits), kept strictly between the largest rate that fitted and the
        # smallest that did not (their geometric mean when it would leave that bracket)
        rate = _next_rate(rate * max(headroom * (1 - PLAN_CLOSE / 2), PLAN_SHRINK), rounds)
    fitting = [i for i, r in enumerate(rounds) if r.fits]
    chosen = min(fitting, key=lambda i: (rounds[i].bytes, i)) if fitting else len(rounds) - 1
    plan, filters, sparing, rates = built[chosen]
    return SettledPlan(plan, filters, sparing, rates, rounds, chosen)


def _next_rate(proposed: float, rounds: list[PlanRound]) -> float:
    """`proposed`, or the geometric mean of the bracket the rounds so far set when it falls outside:
    the largest rate whose plan fitted and the smallest whose plan did not (plans move in steps,
    so a rate between two tried ones is the one left to try)."""
    low = max((r.rate for r in rounds if r.fits), default=0.0)
    high = min((r.rate for r in rounds if not r.fits and r.rate > low), default=MAX_PLANNED_RATE)
    if low < proposed < high:
        return proposed
    return math.sqrt(low * high) if low > 0 else min(proposed, high * PLAN_SHRINK)
