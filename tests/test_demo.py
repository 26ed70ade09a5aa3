"""Tests of the fictional Emberfall demo corpus (tamis.demo)."""

from __future__ import annotations

import math

import lightgbm as lgb
import numpy as np
import polars as pl
import pytest
from scipy.stats import mannwhitneyu, zipf

from tamis import demo

MEMBERS, NON_MEMBERS, SEED = 3_000, 20_000, 11


@pytest.fixture(scope="module")
def corpus() -> demo.DemoCorpus:
    return demo.generate_demo_corpus(MEMBERS, NON_MEMBERS, SEED)


def test_same_arguments_give_the_same_corpus(corpus):
    again = demo.generate_demo_corpus(MEMBERS, NON_MEMBERS, SEED)
    assert again.member_keys == corpus.member_keys
    assert again.nonmember_keys == corpus.nonmember_keys
    assert np.array_equal(again.nonmember_counts, corpus.nonmember_counts)


def test_another_seed_gives_another_corpus(corpus):
    other = demo.generate_demo_corpus(MEMBERS, NON_MEMBERS, SEED + 1)
    assert len(set(other.member_keys) & set(corpus.member_keys)) < MEMBERS // 10
    assert not np.array_equal(other.nonmember_counts, corpus.nonmember_counts)


def test_members_do_not_depend_on_the_number_of_non_members():
    few = demo.generate_demo_corpus(500, 100, SEED)
    many = demo.generate_demo_corpus(500, 5_000, SEED)
    assert few.member_keys == many.member_keys


@pytest.mark.parametrize("members, non_members", [(0, 0), (1, 0), (0, 1), (2, 5), (500, 3_000)])
def test_exact_sizes(members, non_members):
    small = demo.generate_demo_corpus(members, non_members, SEED)
    assert len(small.member_keys) == members
    assert len(small.nonmember_keys) == non_members
    assert small.nonmember_counts.shape == (non_members,)
    assert small.nonmember_counts.dtype == np.int64


def test_classes_are_disjoint_and_duplicate_free(corpus):
    members, non_members = set(corpus.member_keys), set(corpus.nonmember_keys)
    assert len(members) == MEMBERS
    assert len(non_members) == NON_MEMBERS
    assert not members & non_members


def test_handles_respect_length_and_character_rules(corpus):
    for key in corpus.member_keys + corpus.nonmember_keys:
        assert demo.MIN_HANDLE_CHARS <= len(key) <= demo.MAX_HANDLE_CHARS, key
        # str.isprintable() is False for control and format characters and for every separator but
        # the ASCII space, which isspace() catches: together, no whitespace and no control characters.
        assert key.isprintable() and not any(char.isspace() for char in key), repr(key)


def test_non_ascii_letters_appear_mostly_among_players(corpus):
    def non_ascii_share(keys):
        return np.mean([not key.isascii() for key in keys])

    assert 0.02 < non_ascii_share(corpus.nonmember_keys) < 0.2
    assert non_ascii_share(corpus.member_keys) < 0.02


ALL_GENERATORS = sorted({g for g, _ in demo.BOT_MIX + demo.PLAYER_MIX}, key=lambda g: g.__name__)


@pytest.mark.parametrize("generate", ALL_GENERATORS, ids=lambda g: g.__name__)
def test_every_generator_makes_valid_handles(generate):
    handles = generate(np.random.default_rng(5), 2_000)
    assert len(handles) == 2_000
    assert demo._is_valid(handles).all()


def test_a_generator_that_runs_dry_raises():
    def one_handle(rng, n):
        return pl.repeat("ember", n, dtype=pl.String, eager=True)

    with pytest.raises(RuntimeError, match="ran out of distinct handles"):
        demo.distinct_handles(np.random.default_rng(0), [(one_handle, 1.0)], 2)


@pytest.mark.parametrize("bad", [-1, 1.5, True, "10"])
def test_bad_sizes_are_refused(bad):
    with pytest.raises(ValueError, match="non-negative integer"):
        demo.generate_demo_corpus(members=bad, non_members=10)
    with pytest.raises(ValueError, match="non-negative integer"):
        demo.generate_demo_corpus(members=10, non_members=bad)


def test_lookup_counts_follow_the_capped_zipf_law(corpus):
    counts = corpus.nonmember_counts
    n = len(counts)
    assert counts.min() >= 1 and counts.max() <= demo.MAX_LOOKUP_COUNT
    # Zipf law P(k) = k^-a / zeta(a) (numpy's Generator.zipf and scipy.stats.zipf use this pmf);
    # the cap does not touch k = 1, so P(1) = 1/zeta(2) = 6/pi^2 (Euler's Basel sum).
    p_one = zipf.pmf(1, demo.ZIPF_EXPONENT)
    assert p_one == pytest.approx(6 / math.pi**2)
    # Binomial tolerance: 5 standard deviations of the count of ones.
    assert abs((counts == 1).sum() - n * p_one) < 5 * math.sqrt(n * p_one * (1 - p_one))
    # Mean of min(X, cap) from scipy's pmf and survival function, against the sample mean within
    # 5 standard errors.
    mean, mean_square = (capped_zipf_moment(j) for j in (1, 2))
    assert abs(counts.mean() - mean) < 5 * math.sqrt((mean_square - mean**2) / n)


def capped_zipf_moment(power: int) -> float:
    """E[min(X, cap)^power] for X ~ Zipf(a): sum_{k < cap} k^power P(k) + cap^power P(X >= cap)."""
    cap, a = demo.MAX_LOOKUP_COUNT, demo.ZIPF_EXPONENT
    k = np.arange(1, cap)
    below_cap = (k.astype(float) ** power * zipf.pmf(k, a)).sum()
    return float(below_cap + float(cap) ** power * zipf.sf(cap - 1, a))


def test_lookup_counts_are_heavy_tailed(corpus):
    ranked = np.sort(corpus.nonmember_counts)[::-1]
    top_share = ranked[: len(ranked) // 100].sum() / ranked.sum()
    assert top_share > 0.3  # the busiest 1% of handles carry about 45% of lookups by design
    assert np.median(ranked) <= 2  # most handles are looked up once or twice


def test_written_files(tmp_path, corpus):
    members_path, lookups_path = demo.write_demo_corpus(tmp_path / "demo", MEMBERS, NON_MEMBERS, SEED)
    assert members_path == tmp_path / "demo" / "banned_handles.txt"
    assert lookups_path == tmp_path / "demo" / "lookups.parquet"
    text = members_path.read_bytes().decode("utf-8")
    assert text.endswith("\n")
    assert text.split("\n")[:-1] == corpus.member_keys
    lookups = pl.read_parquet(lookups_path)
    assert lookups.schema == pl.Schema({"key": pl.String, "count": pl.Int64})
    assert lookups["key"].to_list() == corpus.nonmember_keys
    assert np.array_equal(lookups["count"].to_numpy(), corpus.nonmember_counts)


def test_written_files_are_byte_identical(tmp_path):
    first = demo.write_demo_corpus(tmp_path / "a", 400, 2_000, SEED)
    second = demo.write_demo_corpus(tmp_path / "b", 400, 2_000, SEED)
    for one, two in zip(first, second):
        assert one.read_bytes() == two.read_bytes()


def character_counts(keys: list[str]) -> np.ndarray:
    """Simple counts per handle: length, digits, upper, lower, other, non-ASCII, vowels and
    switches between digits and non-digits."""
    rows = [
        (
            len(key),
            sum(c.isdigit() for c in key),
            sum(c.isupper() for c in key),
            sum(c.islower() for c in key),
            sum(not c.isalnum() for c in key),
            sum(not c.isascii() for c in key),
            sum(c in "aeiou" for c in key.lower()),
            sum(a.isdigit() != b.isdigit() for a, b in zip(key, key[1:])),
        )
        for key in keys
    ]
    return np.array(rows, dtype=np.float32)


def test_classes_are_separable_but_not_perfectly(corpus):
    members, non_members = corpus.member_keys, corpus.nonmember_keys[: 2 * MEMBERS]
    X = np.vstack([character_counts(members), character_counts(non_members)])
    y = np.r_[np.ones(len(members)), np.zeros(len(non_members))]
    test = np.random.default_rng(0).random(len(y)) < 0.5
    params = {"objective": "binary", "num_leaves": 15, "verbose": -1, "num_threads": 1,
              "deterministic": True, "seed": 1}
    booster = lgb.train(params, lgb.Dataset(X[~test], y[~test]), num_boost_round=100)
    scores, labels = booster.predict(X[test]), y[test]
    # AUC = U / (n_pos n_neg), the Mann-Whitney U of positive against negative scores (common
    # practice; J. A. Hanley and B. J. McNeil, "The meaning and use of the area under a receiver
    # operating characteristic (ROC) curve", Radiology 143(1), 1982, recalled from memory).
    u = mannwhitneyu(scores[labels == 1], scores[labels == 0]).statistic
    auc = u / ((labels == 1).sum() * (labels == 0).sum())
    # Measured about 0.96 at this size over seeds 0..5; imitators (5% of bots, 3.5% of players)
    # keep it well below 1.
    assert 0.93 < auc < 0.985, f"AUC {auc:.4f}"
