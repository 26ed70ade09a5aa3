"""The traffic a served filter records: its lookup sample (rate, thinning, files, replicas) and the
false-positive rate it observes (Wilson's interval, the alarm's false-alarm level)."""

from __future__ import annotations

import logging

import numpy as np
import pytest
from scipy import stats

from tamis.errors import BadInput
from tamis.traffic import (
    SAMPLE_SUFFIX, Served, TrafficRecorder, decode_sample, read_sample_folder, sample_files, wilson_interval,
)

SERVED = Served(build_id="20261204T000000Z-0badcafe", version=3, fpr=0.008, fpr_upper=0.01, target=0.01)


class Clock:
    def __init__(self, now: float = 1_796_083_200.0):
        self.now = now

    def __call__(self) -> float:
        return self.now


@pytest.mark.parametrize("successes, trials", [(0, 10), (3, 10), (50, 1000), (999, 1000), (7, 100_000)])
def test_wilson_interval_matches_scipy(successes, trials):
    """scipy.stats.binomtest(...).proportion_ci(method="wilson") is the reference (scipy >= 1.7)."""
    expected = stats.binomtest(successes, trials).proportion_ci(confidence_level=0.95, method="wilson")
    assert wilson_interval(successes, trials, 0.95) == pytest.approx((expected.low, expected.high), abs=1e-12)
    # one-sided at c is the lower end of the two-sided interval at 2c - 1
    one_sided = stats.binomtest(successes, trials).proportion_ci(confidence_level=0.98, method="wilson")
    assert wilson_interval(successes, trials, 0.99, one_sided=True)[0] == pytest.approx(one_sided.low, abs=1e-12)


def binomial_range(n: int, p: float, tail: float = 1e-6) -> tuple[int, int]:
    """Counts a Binomial(n, p) falls outside of with probability at most 2 x tail (scipy.stats.binom)."""
    return int(stats.binom.ppf(tail, n, p)), int(stats.binom.isf(tail, n, p))


@pytest.mark.parametrize("batch", [1, 1000, 100_000])
def test_each_lookup_is_kept_with_the_sample_rate(batch):
    """Keeping by geometric skips is a Bernoulli(p) draw per lookup: the number kept is binomial."""
    rate, lookups = 1 / 64, 400_000
    recorder = TrafficRecorder(None, rate, seed=11)
    keys = [b"k%d" % i for i in range(batch)]
    answers = np.zeros(batch, dtype=bool)
    for _ in range(lookups // batch):
        if batch > 1:
            recorder.record(SERVED, keys, answers)
        else:
            recorder.record_one(SERVED, keys[0], False)
    kept = sum(recorder._period_keys.values())
    low, high = binomial_range(lookups, rate)
    assert low <= kept <= high


def test_a_heavy_key_is_thinned_binomially_and_light_keys_by_their_share():
    rate = 0.01
    recorder = TrafficRecorder(None, rate, seed=5)
    heavy = [b"heavy"] * 50_000
    light = [b"light-%d" % i for i in range(50_000)]
    recorder.record(SERVED, heavy + light, np.zeros(100_000, dtype=bool))
    low, high = binomial_range(50_000, rate)
    assert low <= recorder._period_keys[b"heavy"] <= high
    light_kept = sum(c for k, c in recorder._period_keys.items() if k != b"heavy")
    assert low <= light_kept <= high


def write_stream(folder, keys, answers, confirmed, clock, seed=1, rate=1.0):
    recorder = TrafficRecorder(folder, rate, clock=clock, seed=seed)
    recorder.record(SERVED, keys, answers)
    for member in confirmed:
        recorder.confirm(SERVED, member)
    recorder.flush()
    return recorder


def test_two_replicas_files_sum_to_what_one_process_seeing_both_would_write(tmp_path):
    rng = np.random.default_rng(3)
    keys = [b"h%d" % k for k in rng.zipf(1.3, 20_000) % 5_000]
    answers = rng.random(20_000) < 0.02
    first, second = slice(0, 12_000), slice(12_000, None)
    clock = Clock()
    (tmp_path / "two").mkdir()
    (tmp_path / "one").mkdir()
    write_stream(tmp_path / "two", keys[first], answers[first], [False] * 100 + [True] * 20, clock, seed=1)
    write_stream(tmp_path / "two", keys[second], answers[second], [False] * 80 + [True] * 10, clock, seed=2)
    write_stream(tmp_path / "one", keys, answers, [False] * 180 + [True] * 30, clock, seed=3)
    two = read_sample_folder(tmp_path / "two", None, clock.now)
    one = read_sample_folder(tmp_path / "one", None, clock.now)
    assert dict(zip(two.keys, two.counts.tolist())) == dict(zip(one.keys, one.counts.tolist()))
    assert (two.replicas, two.files, one.replicas) == (2, 2, 1)
    assert two.served == one.served
    assert two.served[0]["lookups"] == 20_000 and two.served[0]["false_positives"] == 180


def test_files_older_than_the_age_are_skipped(tmp_path):
    clock = Clock()
    write_stream(tmp_path, [b"old"], np.array([False]), [], clock)
    clock.now += 8 * 86_400
    write_stream(tmp_path, [b"new"], np.array([False]), [], clock)
    sample = read_sample_folder(tmp_path, 7 * 86_400, clock.now)
    assert sample.keys == [b"new"] and sample.skipped_old == 1 and sample.files == 1


def one_file(tmp_path):
    write_stream(tmp_path, [b"a", b"b", b"a"], np.array([False, True, False]), [False], Clock())
    (path,) = sample_files(tmp_path)
    return path


@pytest.mark.parametrize("damage, why", [
    (lambda data: data[: len(data) // 2], "bytes where its head announces"),
    (lambda data: data[:-1] + bytes([data[-1] ^ 1]), "checksum does not match"),
    (lambda data: b"PK\x03\x04" + data[4:], "sample magic"),
])
def test_a_torn_or_foreign_sample_file_is_named(tmp_path, damage, why):
    path = one_file(tmp_path)
    path.write_bytes(damage(path.read_bytes()))
    with pytest.raises(BadInput, match=why) as refused:
        read_sample_folder(tmp_path, None, Clock().now)
    assert str(path) in str(refused.value)


def test_a_file_of_another_kind_in_the_folder_is_named_and_a_writers_temporary_is_ignored(tmp_path):
    one_file(tmp_path)
    (tmp_path / f".x{SAMPLE_SUFFIX}.0123.tmp").write_bytes(b"half written")
    assert read_sample_folder(tmp_path, None, Clock().now).keys == [b"a", b"b"]
    (tmp_path / "notes.txt").write_text("hello")
    with pytest.raises(BadInput, match="notes.txt: not a lookup sample file"):
        read_sample_folder(tmp_path, None, Clock().now)


def test_a_period_ends_in_a_file_and_close_writes_the_rest(tmp_path):
    clock = Clock()
    recorder = TrafficRecorder(tmp_path, 1.0, clock=clock, period_seconds=3600, window_seconds=300)
    recorder.record_one(SERVED, b"first", True)
    clock.now += 3601
    recorder.record_one(SERVED, b"second", False)  # the first period has ended: its file is written
    (written,) = sample_files(tmp_path)
    assert decode_sample(written, written.read_bytes())["keys"] == [b"first"]
    recorder.flush()
    assert len(sample_files(tmp_path)) == 2


def run_windows(true_rate: float, windows: int, lookups: int, seed: int, caplog=None) -> TrafficRecorder:
    """A served version certified at fpr_upper 1% answering non-members whose true false-positive
    rate is `true_rate`, every maybe confirmed, one window of `lookups` after another."""
    rng = np.random.default_rng(seed)
    clock = Clock()
    recorder = TrafficRecorder(None, 0.0, clock=clock, window_seconds=300, seed=seed)
    for _ in range(windows):
        false_positives = int(rng.binomial(lookups, true_rate))
        answers = np.zeros(lookups, dtype=bool)
        answers[:false_positives] = True
        recorder.record(SERVED, [], answers)
        for _ in range(false_positives):
            recorder.confirm(SERVED, member=False)
        clock.now += 300
    recorder.record(SERVED, [], np.zeros(0, dtype=bool))  # closes the last window
    return recorder


def test_traffic_at_the_certified_bound_raises_false_alarms_at_most_at_the_stated_level():
    """At a true rate equal to the certified upper bound (the worst case of traffic that behaves as
    certified), a window alarms with probability at most 1 - alarm_confidence = 1%: over 600
    windows the count stays within the binomial range of that level (scipy.stats.binom)."""
    recorder = run_windows(0.01, 600, 20_000, seed=8)
    assert len(recorder.alarms) <= binomial_range(600, 0.01, tail=1e-4)[1]


def test_a_doubled_rate_is_warned_of_in_its_first_window_once(caplog):
    with caplog.at_level(logging.WARNING, logger="tamis.traffic"):
        recorder = run_windows(0.02, 1, 20_000, seed=9)
    assert len(recorder.alarms) == 1
    (record,) = [r for r in caplog.records if r.name == "tamis.traffic"]
    assert "above version 3's certified upper bound 1.0000%" in record.getMessage()


def test_observed_gives_the_rate_and_its_interval_per_window_and_since_start():
    clock = Clock()
    recorder = TrafficRecorder(None, 0.0, clock=clock, window_seconds=300)
    recorder.record(SERVED, [], np.array([True] * 30 + [False] * 970))
    for member in [False] * 20 + [True] * 5:  # 5 maybes left unconfirmed
        recorder.confirm(SERVED, member)
    clock.now += 600
    recorder.record(SERVED, [], np.array([True] * 10 + [False] * 990))
    for _ in range(10):
        recorder.confirm(SERVED, False)
    since = recorder.observed()
    assert since["lookups"] == 2000 and since["false_positives"] == 30 and since["members"] == 5
    assert since["non_member_lookups"] == 1995 and since["unconfirmed"] == 5
    assert since["rate"] == pytest.approx(30 / 1995)
    assert since["rate_low"] == pytest.approx(wilson_interval(30, 1995, 0.95)[0])
    assert since["rate_high"] == pytest.approx(wilson_interval(35, 1995, 0.95)[1])
    last = recorder.observed(seconds=300)
    assert last["lookups"] == 1000 and last["false_positives"] == 10
    assert since["versions"][0]["version"] == 3


def test_an_idle_recorder_still_writes_its_period_when_ticked(tmp_path):
    clock = Clock()
    recorder = TrafficRecorder(tmp_path, 1.0, clock=clock, period_seconds=3600, window_seconds=300)
    recorder.record_one(SERVED, b"only", True)
    clock.now += 3601
    assert not sample_files(tmp_path)
    recorder.tick()  # no lookup since: the refresh thread's tick writes the hour
    (written,) = sample_files(tmp_path)
    assert decode_sample(written, written.read_bytes())["keys"] == [b"only"]
