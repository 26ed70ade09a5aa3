"""The compiled kernels (numba) against the plain numpy path: bit-identical features, identical
scores, identical Bloom answers and identical loader answers, on keys of every shape.

The numpy path is the reference (tests/test_features.py, tests/test_trees.py and tests/test_bloom.py
check it against hand counts, LightGBM itself and the published Bloom formulas); here each kernel
must reproduce it exactly, so both are checked against the same outside sources.
"""

from __future__ import annotations

import os
import subprocess
import sys

import lightgbm as lgb
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

pytest.importorskip("numba")

from tamis import compiled, demo  # noqa: E402
from tamis.bloom import BloomFilter, hash_keys  # noqa: E402
from tamis.features import default_feature_spec, featurize, featurize_columns, pack_keys  # noqa: E402
from tamis.loader import open_filter  # noqa: E402
from tamis.model import compile_booster  # noqa: E402
from tamis.trees import score_batch, score_columns  # noqa: E402

SPECS = [default_feature_spec(),
         {**default_feature_spec(), "bigram_buckets": 1, "trigram_buckets": 2, "affix_buckets": 1},
         {**default_feature_spec(), "bigram_buckets": 128, "trigram_buckets": 64, "affix_buckets": 65536}]


@pytest.fixture(autouse=True)
def _needs_the_kernels():
    if not compiled.ENABLED:
        pytest.skip(f"the compiled path is disabled ({compiled.NUMPY_ONLY_VARIABLE} is set)")


def on_both_paths(run):
    """(numpy result, compiled result) of run()."""
    compiled.ENABLED = False
    try:
        reference = run()
    finally:
        compiled.ENABLED = True
    return reference, run()


def demo_handles(count: int) -> list[bytes]:
    rng = np.random.default_rng(5)
    makers = [demo.bot_word_digits, demo.bot_base36_run, demo.bot_leetspeak, demo.bot_farm_serial,
              demo.player_name_year, demo.player_word_pair, demo.player_wrapped, demo.player_name_word]
    return [h.encode("utf-8") for make in makers for h in make(rng, count // len(makers)).to_list()]


def awkward_keys() -> list[bytes]:
    """Empty, one- and two-byte keys, every byte value, long keys, non-ASCII, digit runs at the ends."""
    return [b"", b"a", b"9", b"\x00", b"Ab", b"99", bytes(range(256)), bytes(range(256))[::-1] * 3,
            b"a" * 5000, b"12" * 700 + b"x", "h\u00e9ros_\u2603_\U0001f409".encode(), b"007bond007",
            b"__--..  ", b"AEIOUaeiouy", b"\xff\xfe\x80"]


def assert_same_features(keys: list[bytes], spec: dict) -> None:
    data, offsets = pack_keys(keys)
    numpy_columns, compiled_columns = on_both_paths(lambda: featurize_columns(data, offsets, spec))
    assert np.array_equal(numpy_columns.view(np.uint32), compiled_columns.view(np.uint32))


@pytest.mark.parametrize("spec", SPECS)
def test_features_are_bit_identical_on_demo_handles_and_awkward_keys(spec):
    assert_same_features(demo_handles(4000) + awkward_keys(), spec)


@settings(max_examples=60, deadline=None)
@given(st.lists(st.binary(max_size=70), max_size=150), st.sampled_from(SPECS))
def test_features_are_bit_identical_on_random_bytes(keys, spec):
    assert_same_features(keys, spec)


@settings(max_examples=30, deadline=None)
@given(st.lists(st.text(max_size=30), max_size=100))
def test_features_are_bit_identical_on_random_text(texts):
    assert_same_features([t.encode("utf-8", "surrogatepass") for t in texts], SPECS[0])


@pytest.fixture(scope="module")
def forest_and_rows():
    """A LightGBM forest trained on demo-handle features (bots against players), and fresh rows."""
    spec = default_feature_spec()
    rng = np.random.default_rng(9)
    bots = [h.encode() for make in (demo.bot_word_digits, demo.bot_base36_run, demo.bot_leetspeak)
            for h in make(rng, 1500).to_list()]
    players = [h.encode() for make in (demo.player_name_year, demo.player_word_pair, demo.player_wrapped)
               for h in make(rng, 1500).to_list()]
    X = featurize(bots + players, spec)
    params = {"objective": "binary", "num_leaves": 31, "verbose": -1, "num_threads": 2, "seed": 1,
              "deterministic": True, "min_data_in_leaf": 5}
    booster = lgb.train(params, lgb.Dataset(X, np.r_[np.ones(len(bots)), np.zeros(len(players))]), num_boost_round=15)
    fresh = featurize(demo_handles(3000) + awkward_keys(), spec)
    return compile_booster(booster), fresh


def test_scores_are_identical(forest_and_rows):
    forest, X = forest_and_rows
    # rows at every threshold and the float32s either side of it, plus NaN (goes left on both paths)
    edges = np.repeat(X[:1], 3 * len(forest.threshold) + 1, axis=0)
    for i, (f, t) in enumerate(zip(forest.feature.tolist(), forest.threshold.astype(np.float32))):
        edges[3 * i : 3 * i + 3, f] = [np.nextafter(t, -np.inf), t, np.nextafter(t, np.inf)]
    edges[-1, :] = np.nan
    rows = np.vstack([X, edges])
    numpy_scores, compiled_scores = on_both_paths(lambda: score_batch(forest, rows))
    assert np.array_equal(numpy_scores, compiled_scores)
    columns = np.ascontiguousarray(rows.T)
    assert np.array_equal(*on_both_paths(lambda: score_columns(forest, columns)))
    assert np.array_equal(*on_both_paths(lambda: score_columns(forest, columns[:, :0])))


@pytest.mark.parametrize("bits, probes", [(1, 1), (64, 3), (1000, 7), (1_000_003, 12)])
def test_bloom_answers_are_identical(bits, probes):
    rng = np.random.default_rng(bits)
    bloom = BloomFilter.empty(bits, probes, seed=77)
    members = [bytes(rng.integers(0, 256, 12).astype(np.uint8)) for _ in range(min(bits // 10, 300))]
    bloom.insert(members)
    queries = members + [bytes(rng.integers(0, 256, 9).astype(np.uint8)) for _ in range(3000)]
    hashes = hash_keys(queries, 77)
    numpy_answers, compiled_answers = on_both_paths(lambda: bloom.query_hashes(hashes))
    assert np.array_equal(numpy_answers, compiled_answers) and compiled_answers[: len(members)].all()


def test_loader_answers_are_identical(forest_and_rows, tmp_path):
    from tamis.filters import build_filters
    from tamis.package import package_artifact
    from tamis.regions import RegionSettings, plan_regions, region_of

    forest, _ = forest_and_rows
    spec = default_feature_spec()
    rng = np.random.default_rng(3)
    handles = demo_handles(6000)
    members = sorted(set(handles[::2]))
    others = [k for k in handles[1::2] if k not in set(members)]
    member_scores = score_batch(forest, featurize(members, spec))
    plan = plan_regions(member_scores, score_batch(forest, featurize(others, spec)), None, 0.05, RegionSettings(segments=100))
    filters = build_filters(members, region_of(member_scores, plan.boundaries), plan.fprs, 99)
    path = tmp_path / "both.tamis"
    package_artifact(path, feature_spec=spec, forest=forest, boundaries=plan.boundaries, region_filters=filters,
                     hash_seed=99, provenance={"test": "compiled"})
    loaded = open_filter(path)
    queries = members + others + awkward_keys() + [k.decode("latin-1") for k in awkward_keys()]
    rng.shuffle(queries)
    numpy_answers, compiled_answers = on_both_paths(lambda: loaded.contains_many(queries))
    assert np.array_equal(numpy_answers, compiled_answers)
    assert loaded.contains_many(members).all()  # zero false negatives on the compiled path


def test_the_environment_variable_forces_the_numpy_path():
    code = "from tamis import compiled; print(compiled.ENABLED)"
    for value, expected in (("1", "False"), ("0", "True")):
        env = dict(os.environ, **{compiled.NUMPY_ONLY_VARIABLE: value})
        done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
        assert done.stdout.strip() == expected


def test_the_numpy_answer_path_runs_no_kernel_and_leaves_other_threads_compiled(monkeypatch):
    import threading
    from pathlib import Path

    artifact = Path(__file__).parent / "data" / "format-1.0.tamis"
    loaded = open_filter(artifact)
    keys = [b"%d" % i for i in range(2000)]
    expected = loaded.contains_many(keys)

    def no_kernel(*args):
        raise AssertionError("a compiled kernel ran on the numpy path")

    for name in ("featurize_into", "score_rows", "score_packed", "bloom_query"):
        monkeypatch.setattr(compiled, name, no_kernel)
    assert loaded.answers_through("numpy", keys).tolist() == expected.tolist()
    with pytest.raises(AssertionError, match="compiled kernel ran"):
        loaded.answers_through("compiled", keys)
    seen_elsewhere = []
    with compiled.numpy_reference():
        worker = threading.Thread(target=lambda: seen_elsewhere.append(compiled.in_use()))
        worker.start()
        worker.join()
        assert not compiled.in_use()
    assert seen_elsewhere == [True] and compiled.in_use()
