"""Keys unlike the sample: how the written artifact answers key families its build never saw.

The certified rate holds for lookups drawn like the held-out non-members. A learned filter can
answer "maybe" to most keys of another shape (a region at rate 1 answers every key there), and a
shift of traffic towards such keys multiplies the service's lookups while every certified figure
stays green. This stage asks the written artifact, through the loader, about a probe set of
families drawn from a seeded generator, none of them a member:

    random base-36   random strings of 0-9a-z, each of the length of a member drawn at random
    one changed      a member with one character replaced by another of 0-9a-z
    hex digests      16 hex digits
    numbers          decimal numbers below 10^9
    host names       user<n>.example<m>.com

and reports each family's share of "maybe" beside the certified rate (a share near 1 says the
filter does not screen that shape of key at all). The gate rule max_unlike_rate (off by default)
refuses an artifact whose worst family is above it; the region cap `regions.max_region_fpr`
bounds every region's rate and so every family's, at a cost in bytes the report states for a cap
of CAP_TARGETS x the target (`cap_cost`: the plan at the settled rate priced with and without it).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from tamis.regions import RegionSettings, plan_regions

# Keys a family: the share of maybe is then known to within about +-0.7% at 95% (binomial, p = 0.5).
PROBES_PER_FAMILY = 20_000
# The cap whose cost the report states: every region at most ten times the target, so a key of any
# shape passes at most at ten times the rate certified for the sample's shapes.
CAP_TARGETS = 10
_ALPHABET = np.frombuffer(b"0123456789abcdefghijklmnopqrstuvwxyz", dtype=np.uint8)


def _random_base36(rng: np.random.Generator, members: list[bytes], count: int) -> list[bytes]:
    lengths = np.array([len(members[i]) for i in rng.integers(0, len(members), count)])
    letters = _ALPHABET[rng.integers(0, len(_ALPHABET), int(lengths.sum()))].tobytes()
    ends = np.cumsum(lengths)
    return [letters[end - length : end] for end, length in zip(ends.tolist(), lengths.tolist())]


def _one_changed(rng: np.random.Generator, members: list[bytes], count: int) -> list[bytes]:
    picked = [members[i] for i in rng.integers(0, len(members), count)]
    positions = rng.random(count)
    letters = _ALPHABET[rng.integers(0, len(_ALPHABET), count)]
    changed = []
    for key, at, letter in zip(picked, positions.tolist(), letters.tolist()):
        i = int(at * len(key))
        changed.append(key[:i] + bytes([letter]) + key[i + 1 :])
    return changed


def _hex_digests(rng: np.random.Generator, members: list[bytes], count: int) -> list[bytes]:
    return [b"%016x" % value for value in rng.integers(0, 2**63, count, dtype=np.int64).tolist()]


def _numbers(rng: np.random.Generator, members: list[bytes], count: int) -> list[bytes]:
    return [b"%d" % value for value in rng.integers(0, 10**9, count).tolist()]


def _host_names(rng: np.random.Generator, members: list[bytes], count: int) -> list[bytes]:
    users, hosts = rng.integers(0, 100_000, count).tolist(), rng.integers(0, 1000, count).tolist()
    return [b"user%d.example%d.com" % pair for pair in zip(users, hosts)]


FAMILIES: dict[str, Callable[[np.random.Generator, list[bytes], int], list[bytes]]] = {
    "random base-36": _random_base36,
    "one changed": _one_changed,
    "hex digests": _hex_digests,
    "numbers": _numbers,
    "host names": _host_names,
}


def probe_keys(members: list[bytes], seed: int, per_family: int = PROBES_PER_FAMILY) -> dict[str, list[bytes]]:
    """Each family's probe keys, members removed; the same members and seed give the same keys."""
    member_set = set(members)
    probes = {}
    for index, (name, draw) in enumerate(FAMILIES.items()):
        rng = np.random.default_rng([seed, index])
        probes[name] = [key for key in draw(rng, members, per_family) if key not in member_set]
    return probes


@dataclass(frozen=True)
class UnlikeKeys:
    """Each family's share of "maybe" on the written artifact, and its probe count."""

    rates: dict[str, float]
    probes: dict[str, int]

    @property
    def worst(self) -> tuple[str, float]:
        name = max(self.rates, key=self.rates.get)
        return name, self.rates[name]

    def as_report(self) -> dict:
        name, rate = self.worst
        return {"families": {family: {"probes": self.probes[family], "maybe_rate": self.rates[family]}
                             for family in self.rates},
                "worst_family": name, "worst_rate": rate}


def measure_unlike_keys(answer: Callable[[list[bytes]], np.ndarray], members: list[bytes], seed: int,
                        per_family: int = PROBES_PER_FAMILY) -> UnlikeKeys:
    """Ask `answer` (the loaded artifact's contains_many) about every family's probes."""
    probes = probe_keys(members, seed, per_family)
    rates = {name: float(np.mean(answer(keys))) if keys else 0.0 for name, keys in probes.items()}
    return UnlikeKeys(rates, {name: len(keys) for name, keys in probes.items()})


@dataclass(frozen=True)
class CapCost:
    """The region plan at the settled rate without a cap and with `regions.max_region_fpr = cap`:
    their priced bytes (filters, sections and regions, as `plan_regions` prices them)."""

    cap: float
    bytes_without: int
    bytes_with: int

    def as_report(self) -> dict:
        return {"max_region_fpr": self.cap, "planned_bytes_without": self.bytes_without,
                "planned_bytes_with": self.bytes_with, "ratio": self.bytes_with / self.bytes_without}


def cap_cost(member_scores, nonmember_scores, nonmember_weights, rate: float, settings: RegionSettings,
             target: float) -> CapCost:
    """What capping every region at CAP_TARGETS x the target would cost the plan at `rate`."""
    cap = min(1.0, CAP_TARGETS * target)
    plans = [plan_regions(member_scores, nonmember_scores, nonmember_weights, rate,
                          dataclasses.replace(settings, max_region_fpr=min(limit, settings.max_region_fpr)), refine=False)
             for limit in (1.0, cap)]
    return CapCost(cap, *(plan.estimated_total_bits // 8 for plan in plans))
