"""Keys unlike the sample: the probe families are reproducible, never members, and their measured
share of "maybe" is the share the answering filter gives them."""

import numpy as np
import pytest
import xxhash
from scipy import stats

from tamis.probes import FAMILIES, measure_unlike_keys, probe_keys

MEMBERS = [b"bot_%05d_zz" % i for i in range(5_000)] + [b"x"]


def test_probes_are_reproducible_and_never_members():
    first, again = probe_keys(MEMBERS, seed=4, per_family=2_000), probe_keys(MEMBERS, seed=4, per_family=2_000)
    assert first == again and set(first) == set(FAMILIES)
    assert probe_keys(MEMBERS, seed=5, per_family=2_000) != first
    members = set(MEMBERS)
    for name, keys in first.items():
        assert keys and not members.intersection(keys), name
    # one changed differs from some member in exactly one place
    changed = first["one changed"][0]
    assert any(len(m) == len(changed) and sum(a != b for a, b in zip(m, changed)) == 1 for m in MEMBERS)
    lengths = {len(m) for m in MEMBERS}
    assert {len(k) for k in first["random base-36"]} <= lengths


def test_the_measured_share_is_the_filters_share_within_binomial_error():
    """A stand-in filter that answers maybe to a fixed 30% of keys by hash: each family's measured
    share lies within the binomial range of 30% (scipy.stats.binom), and an exact set gives 0."""
    def thirty_percent(keys):
        return np.array([xxhash.xxh3_64_intdigest(k) % 10 < 3 for k in keys])

    measured = measure_unlike_keys(thirty_percent, MEMBERS, seed=1, per_family=5_000)
    for name, rate in measured.rates.items():
        n = measured.probes[name]
        low, high = stats.binom.ppf(1e-6, n, 0.3) / n, stats.binom.isf(1e-6, n, 0.3) / n
        assert low <= rate <= high, name
    exact = measure_unlike_keys(lambda keys: np.isin(np.array(keys, dtype=object), MEMBERS), MEMBERS, seed=1, per_family=1_000)
    assert exact.worst[1] == 0.0
    always = measure_unlike_keys(lambda keys: np.ones(len(keys), dtype=bool), MEMBERS, seed=1, per_family=1_000)
    assert always.as_report()["worst_rate"] == 1.0


def test_a_cap_never_makes_the_plan_cheaper_and_its_cost_is_the_plan_with_it():
    """The capped plan solves the same problem with one more constraint (every f_i <= cap), so its
    priced bytes are at least the uncapped plan's; both are plan_regions' own figures."""
    from tamis.probes import cap_cost
    from tamis.regions import RegionSettings, plan_regions

    rng = np.random.default_rng(2)
    members = rng.normal(3.0, 1.0, 4_000).round(3) * 1000
    others = rng.normal(0.0, 1.0, 40_000).round(3) * 1000
    weights = rng.zipf(2.0, 40_000).astype(float)
    settings = RegionSettings(segments=200)
    cost = cap_cost(members.astype(np.int64), others.astype(np.int64), weights, 0.01, settings, target=0.01)
    assert cost.cap == pytest.approx(0.1)
    assert cost.bytes_with >= cost.bytes_without
    capped = plan_regions(members.astype(np.int64), others.astype(np.int64), weights, 0.01,
                          RegionSettings(segments=200, max_region_fpr=0.1), refine=False)
    assert cost.bytes_with == capped.estimated_total_bits // 8
    assert capped.fprs.max() <= 0.1
