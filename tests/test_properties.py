"""Properties over random inputs: every member of a random small corpus answers yes from the
written artifact (invariant 1), and the held-out upper bound covers the true rate as often as its
confidence says (invariant 3's honesty, checked by simulation)."""

from __future__ import annotations

import math
import string

import numpy as np
import pytest
from hypothesis import HealthCheck, event, example, given, settings
from hypothesis import strategies as st
from scipy import optimize, stats

from tamis.bloom import BloomFilter, hash_keys
from tamis.sizing import bloom_bits, bloom_hashes
from tamis.features import default_feature_spec, featurize
from tamis.loader import open_filter
from tamis.query import available_paths, region_of
from tamis.trees import score_batch
from tamis.verify import gamma_upper, rate_upper
from tamis_testing import HASH_SEED, build_artifact

ALPHABETS = {
    "lower": string.ascii_lowercase.encode(),
    "digits": string.digits.encode(),
    "base36": (string.ascii_lowercase + string.digits).encode(),
    "one letter": b"a",
    "utf-8 text": "äöüßéλжガ_-. ".encode(),  # multi-byte sequences cut anywhere: raw bytes to the pipeline
    "any byte": bytes(range(256)),
}


@st.composite
def corpora(draw):
    """Members and training / validation non-members, disjoint, from one random alphabet each."""
    def keys(alphabet: bytes, low: int, high: int, size_low: int, size_high: int) -> list[bytes]:
        key = st.binary(min_size=low, max_size=high).map(lambda raw: bytes(alphabet[b % len(alphabet)] for b in raw))
        return draw(st.lists(key, min_size=size_low, max_size=size_high, unique=True))

    member_alphabet = ALPHABETS[draw(st.sampled_from(sorted(ALPHABETS)))]
    other_alphabet = ALPHABETS[draw(st.sampled_from(sorted(ALPHABETS)))]
    short, long = draw(st.integers(1, 8)), draw(st.integers(8, 300))
    members = keys(member_alphabet, short, long, 1, 40)
    taken = set(members)
    others = [k for k in keys(other_alphabet, 1, 40, 2, 80) if k not in taken]
    if len(others) < 2:
        others = [k for k in (b"\x00\x00", b"\x01\x01", b"\x02") if k not in taken][:2]
    cut = draw(st.integers(1, len(others) - 1))
    weights = draw(st.sampled_from(["ones", "counts"]))
    counts = np.array([1 + (hash(k) % 7) if weights == "counts" else 1 for k in others], dtype=np.float64)
    return members, others[:cut], counts[:cut], others[cut:], counts[cut:]


def random_plan(rng_seed: int, member_scores, val_scores, target):
    """Boundaries drawn among the scores and budgets drawn in [target, 1] (0 for a region without
    members): any plan at all must keep every member, not only a good one."""
    rng = np.random.default_rng(rng_seed)
    scores = np.unique(np.r_[member_scores, val_scores])
    boundaries = np.unique(rng.choice(scores, size=min(len(scores), rng.integers(0, 6)), replace=False)).astype(np.int64)
    regions = region_of(member_scores, boundaries)
    fprs = rng.uniform(target, 1.0, len(boundaries) + 1)
    fprs[rng.random(len(fprs)) < 0.3] = 1.0
    fprs[np.bincount(regions, minlength=len(fprs)) == 0] = 0.0
    return boundaries, fprs


TARGETS = st.sampled_from([1e-6, 1e-3, 0.05, 0.5])
MODELS = st.sampled_from(["chosen", 1, 3, 6])
PROPERTY_SETTINGS = settings(max_examples=40, deadline=None,
                             suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


def assert_every_member_answers_yes(path, members, regions: int) -> None:
    loaded = open_filter(path)
    modes = sorted({region["mode"] for region in loaded.info["regions"]})
    event(f"{regions} regions, {'a model' if loaded.forest.trees else 'no model'}, modes {modes}")
    for answer_path in available_paths():
        on_path = loaded.using(answer_path)
        assert on_path.contains_many(members).all(), f"a member answered no ({regions} regions, {answer_path})"
        assert all(on_path.contains(key) for key in members), f"a member answered no to contains ({answer_path})"


@PROPERTY_SETTINGS
@given(corpus=corpora(), target=TARGETS, how=MODELS)
@example(corpus=([b"only"], [b"x1", b"x2"], np.ones(2), [b"y1", b"y2"], np.ones(2)), target=1e-6, how="chosen")
@example(corpus=([b"only"], [b"x1"], np.ones(1), [b"y1"], np.ones(1)), target=0.5, how=3)
def test_every_member_of_a_random_corpus_answers_yes(tmp_path, corpus, target, how):
    path = tmp_path / "artifact.tamis"
    regions = build_artifact(path, corpus, target, how)
    assert_every_member_answers_yes(path, corpus[0], regions)


@PROPERTY_SETTINGS
@given(corpus=corpora(), target=TARGETS, how=st.sampled_from([1, 3, 6]), plan_seed=st.integers(0, 2**32 - 1))
def test_every_member_answers_yes_under_any_region_plan(tmp_path, corpus, target, how, plan_seed):
    path = tmp_path / "artifact.tamis"
    regions = build_artifact(path, corpus, target, how, plan=lambda ms, vs: random_plan(plan_seed, ms, vs, target))
    assert_every_member_answers_yes(path, corpus[0], regions)


def test_members_all_in_one_region_answer_yes(tmp_path):
    # identical keys but for their order score the same under any model: one region holds them all
    members = [bytes(p) for p in {(97, 98, 99, 100), (98, 99, 100, 97), (99, 100, 97, 98), (100, 97, 98, 99)}]
    train, validation = [b"zz", b"zzzz", b"q1q1"], [b"yy", b"yyyy", b"w2w2"]
    path = tmp_path / "artifact.tamis"
    build_artifact(path, (members, train, np.ones(3), validation, np.ones(3)), 1e-6, how=6)
    loaded = open_filter(path)
    spec = default_feature_spec()
    scores = score_batch(loaded.forest, featurize(members, spec))
    assert len(set(region_of(scores, np.array(loaded.boundaries)).tolist())) == 1
    assert loaded.contains_many(members).all()


# --- the held-out bound's coverage ------------------------------------------------------------------

CONFIDENCE = 0.95
SEEDS = 1000
# A coverage rate is a binomial count over SEEDS runs: 4 standard deviations (common practice).
SIGMAS = 4.0


def poisson_upper_by_root(x: int, confidence: float) -> float:
    """The one-sided upper limit of a Poisson mean from its definition: the mean at which seeing x
    or fewer has probability 1 - confidence (F. Garwood, Biometrika 1936), by root-finding on
    scipy's Poisson distribution."""
    return optimize.brentq(lambda mu: stats.poisson.cdf(x, mu) - (1 - confidence), 1e-12, 10.0 * x + 50, xtol=1e-12)


def key_rate_upper(false_positives, heldout: int, confidence: float = CONFIDENCE):
    """The build's bound (`rate_upper`) on a corpus without counts: n held-out keys of 3n."""
    return rate_upper(3 * heldout, 0, false_positives, false_positives, 1 / 3, 1, confidence)


def exact_miss_probability(n: int, p: float, confidence: float) -> float:
    """P(upper bound < p) when the count is Binomial(n, p): the count must be at most the largest x
    whose bound is below p (the bound grows with x)."""
    x = 0
    while x <= n and key_rate_upper(x, n, confidence) < p:
        x += 1
    return float(stats.binom.cdf(x - 1, n, p)) if x else 0.0


@pytest.mark.parametrize("x", [0, 3, 17, 250])
def test_the_bound_is_the_poisson_root(x):
    assert gamma_upper(x, x, 1.0, CONFIDENCE) == pytest.approx(poisson_upper_by_root(x, CONFIDENCE), rel=1e-8)


@pytest.mark.parametrize("p", [0.002, 0.01, 0.05, 0.2])
def test_the_held_out_bound_misses_the_true_rate_no_more_often_than_its_confidence_allows(p):
    n = 2000
    rng = np.random.default_rng(int(p * 1e6))
    misses = int(np.sum(key_rate_upper(rng.binomial(n, p, SEEDS), n) < p))
    q = exact_miss_probability(n, p, CONFIDENCE)
    assert q <= 1 - CONFIDENCE, "the Poisson bound on a binomial count is at least as wide as Clopper-Pearson's"
    assert abs(misses - SEEDS * q) <= SIGMAS * math.sqrt(SEEDS * q * (1 - q)) + 1, (misses, SEEDS * q)


def test_the_bound_covers_a_real_bloom_filters_rate():
    # One Bloom filter; its true rate is measured on a million fresh keys (standard error about
    # 1% of the rate), then 300 held-out samples of 2,000 fresh keys each are bounded.
    members = [f"member-{i}".encode() for i in range(2000)]
    bits = bloom_bits(len(members), 0.02)
    bloom = BloomFilter.empty(bits, bloom_hashes(bits, len(members)), HASH_SEED)
    bloom.insert(members)
    fresh = [f"fresh-{i}".encode() for i in range(1_000_000 + 300 * 2000)]
    answers = bloom.query_hashes(hash_keys(fresh, HASH_SEED))
    true_rate = answers[:1_000_000].mean()
    samples = answers[1_000_000:].reshape(300, 2000)
    misses = int(np.sum(key_rate_upper(samples.sum(axis=1), 2000) < true_rate))
    alpha = 1 - CONFIDENCE
    assert 0.01 < true_rate < 0.03
    assert misses <= 300 * alpha + SIGMAS * math.sqrt(300 * alpha * (1 - alpha))
