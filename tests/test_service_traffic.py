"""The service feeds and watches the build: served filters record Zipf-like traffic from threads,
the build reads their files as its non-members and certifies a rate that fresh traffic from the
same generator meets; a shift to unlike keys raises the alarm within one window."""

from __future__ import annotations

import json
import logging
import math
import threading

import numpy as np
import pytest

from tamis.demo import generate_demo_corpus
from tamis.loader import ServedFilter, open_filter
from tamis.probes import measure_unlike_keys, probe_keys
from tamis.traffic import TrafficRecorder, sample_files
from small_build import small_config
from tamis_testing import plain_build_flow

SAMPLE_RATE = 0.5
LOOKUPS_PER_THREAD = 60_000
BATCH = 1_000


class Clock:
    def __init__(self, now: float = 1_796_083_200.0):
        self.now = now

    def __call__(self) -> float:
        return self.now


class Traffic:
    """Lookups of the demo population: player handles drawn with their Zipf popularity, and one
    lookup in twenty of a banned handle (a member)."""

    def __init__(self, seed: int = 21):
        demo = generate_demo_corpus(members=3_000, non_members=50_000, seed=seed)
        self.members = [k.encode() for k in demo.member_keys]
        self.players = [k.encode() for k in demo.nonmember_keys]
        self.weights = demo.nonmember_counts / demo.nonmember_counts.sum()
        self.member_set = set(self.members)

    def draw(self, rng: np.random.Generator, n: int) -> list[bytes]:
        players = rng.choice(len(self.players), n, p=self.weights)
        keys = [self.players[i] for i in players]
        for at in np.flatnonzero(rng.random(n) < 0.05).tolist():
            keys[at] = self.members[int(rng.integers(len(self.members)))]
        return keys


def serve(served: ServedFilter, traffic: Traffic, seed: int) -> None:
    """One service thread: batches and single lookups, every maybe confirmed."""
    rng = np.random.default_rng(seed)
    for start in range(0, LOOKUPS_PER_THREAD, BATCH):
        keys = traffic.draw(rng, BATCH)
        answers = served.contains_many(keys) if start % (4 * BATCH) else np.array([served.contains(k) for k in keys])
        for key, answer in zip(keys, answers.tolist()):
            if answer:
                served.confirm(key, key in traffic.member_set)


@pytest.fixture(scope="module")
def fed(tmp_path_factory):
    root = tmp_path_factory.mktemp("fed")
    traffic = Traffic()
    members = root / "members.txt"
    members.write_bytes(b"".join(k + b"\n" for k in traffic.members))
    lookups = root / "first_lookups.txt"  # the first build: one lookup each of a day's distinct keys
    lookups.write_bytes(b"".join(k + b"\n" for k in dict.fromkeys(traffic.draw(np.random.default_rng(1), 100_000))
                                 if k not in traffic.member_set))
    store, samples = root / "store", root / "samples"
    samples.mkdir()
    with plain_build_flow() as build_flow:
        first = build_flow(small_config(members, lookups, store))
        assert first.published
        replicas = [open_filter(store, sample_folder=samples, sample_rate=SAMPLE_RATE) for _ in range(2)]
        threads = [threading.Thread(target=serve, args=(replicas[i // 2], traffic, 100 + i)) for i in range(4)]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        observed = [replica.observed() for replica in replicas]
        for replica in replicas:
            replica.close()
        second = build_flow(small_config(members, samples, store))
    return {"traffic": traffic, "first": first, "second": second, "observed": observed, "samples": samples, "store": store}


def test_each_replica_writes_one_whole_file_and_counts_every_lookup(fed):
    assert len(sample_files(fed["samples"])) == 2
    for observed in fed["observed"]:
        assert observed["lookups"] == 2 * LOOKUPS_PER_THREAD
        assert observed["unconfirmed"] == 0  # every maybe was confirmed


def test_the_build_reads_the_folder_and_says_what_it_held(fed):
    report = fed["second"].report
    sample = report["corpus"]["sample"]
    assert sample["files"] == 2 and sample["replicas"] == 2 and sample["sample_rates"] == [SAMPLE_RATE]
    # every lookup is kept with probability 1/2: the kept count is Binomial(240,000, 1/2)
    total = 4 * LOOKUPS_PER_THREAD
    kept = sample["lookups"]  # every sampled lookup, those of members included
    assert abs(kept - total * SAMPLE_RATE) <= 5 * math.sqrt(total * SAMPLE_RATE * (1 - SAMPLE_RATE))
    assert sample["member_keys"] > 0  # members looked up were left out, not refused as conflicts
    (served,) = sample["served"]
    assert served["version"] == 1 and served["lookups"] == total
    first = fed["first"].report["heldout"]
    assert served["fpr"] == pytest.approx(first["fpr"]) and served["fpr_upper"] == pytest.approx(first["fpr_upper"])
    saved = json.loads((fed["second"].folder / "report.json").read_text())
    assert saved["corpus"]["sample"]["replicas"] == 2


def test_the_certified_rate_holds_on_fresh_traffic_from_the_same_generator(fed):
    """Fresh lookups of the same population (a new seed: tomorrow's traffic) meet the certified
    rate within the two estimates' sampling error, and stay under the certified upper bound."""
    second = fed["second"]
    assert second.published, second.report["gate"]["reasons"]
    traffic = fed["traffic"]
    fresh = [k for k in traffic.draw(np.random.default_rng(999), 300_000) if k not in traffic.member_set]
    with open_filter(fed["store"]) as served:
        assert served.version == second.version
        rate = float(served.contains_many(fresh).mean())
    held = second.report["heldout"]
    certified = held["fpr"]
    error = math.sqrt(certified * (1 - certified) / held["effective_sample"] + rate * (1 - rate) / len(fresh))
    assert abs(rate - certified) <= 4 * error, (rate, certified, error)
    assert rate <= held["fpr_upper"]


def test_a_shift_to_unlike_keys_is_warned_of_within_one_window_and_steady_traffic_never(fed, caplog):
    traffic = fed["traffic"]
    artifact = fed["second"].folder / "artifact.tamis"
    family, worst = measure_unlike_keys(open_filter(artifact).contains_many, traffic.members, seed=3).worst
    shifted = probe_keys(traffic.members, seed=4, per_family=5_000)[family]
    clock = Clock()
    rng = np.random.default_rng(5)

    def one_window(served, keys):
        for key in np.asarray(keys, dtype=object)[served.contains_many(keys)]:
            served.confirm(key, False)
        clock.now += 60
        served.contains_many([])  # the next lookup closes the window

    with ServedFilter(fed["store"], traffic=TrafficRecorder(None, 0.0, clock=clock, window_seconds=60)) as served:
        assert worst > 2 * served.fpr_upper, (family, worst)  # a shift this test can see
        with caplog.at_level(logging.WARNING, logger="tamis.traffic"):
            for _ in range(10):  # ten windows of steady traffic: no alarm
                one_window(served, [k for k in traffic.draw(rng, 20_000) if k not in traffic.member_set])
            assert served.observed()["alarms"] == 0 and not caplog.records
            one_window(served, shifted)  # one window of the unlike family: one alarm
        assert served.observed()["alarms"] == 1
        (record,) = caplog.records
        assert f"above version {served.version}'s certified upper bound" in record.getMessage()


def test_show_prints_the_rate_observed_in_service_beside_the_certified_one(fed, capsys):
    from tamis import cli

    assert cli.main(["show", str(fed["store"])]) == 0
    shown = capsys.readouterr().out
    assert "observed in service (sample files of the last day in" in shown
    assert "version 1: certified" in shown and "observed in service" in shown
