"""The compiled query path (numba) against the numpy reference: bit-identical features, identical
scores, regions, Bloom and binary fuse answers, and identical loader answers on the batch and
single-key calls, on keys of every shape.

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
from tamis.booster import compile_booster  # noqa: E402
from tamis.fuse import build_fuse  # noqa: E402
from tamis.features import default_feature_spec, feature_layout, featurize, featurize_columns, pack_keys  # noqa: E402
from tamis.loader import open_filter  # noqa: E402
from tamis.query import CompiledPath, Constant, NumpyPath, QueryTables, pack_batch  # noqa: E402
from tamis.trees import Forest, score_batch  # noqa: E402

SPECS = [default_feature_spec(),
         {**default_feature_spec(), "bigram_buckets": 1, "trigram_buckets": 2, "affix_buckets": 1},
         {**default_feature_spec(), "bigram_buckets": 128, "trigram_buckets": 64, "affix_buckets": 65536}]


@pytest.fixture(autouse=True)
def _needs_the_kernels():
    if not compiled.ENABLED:
        pytest.skip(f"the compiled path is disabled ({compiled.NUMPY_ONLY_VARIABLE} is set)")


def no_trees(features: int) -> Forest:
    empty = np.zeros(0, dtype=np.int8)
    return Forest(features=features, scale=1, bias=0, tree_splits=np.zeros(0, dtype=np.uint8),
                  feature=np.zeros(0, dtype=np.uint8), threshold=np.zeros(0, dtype=np.float32),
                  left=empty, right=empty, value=np.zeros(1, dtype=np.int16)[:0])


def tables(spec, forest=None, boundaries=(), regions=(Constant(True),), seed=0) -> QueryTables:
    layout = feature_layout(spec)
    return QueryTables(layout, forest or no_trees(layout.count), tuple(boundaries), tuple(regions), seed)


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
    reference = featurize_columns(data, offsets, spec)
    kernel = np.empty_like(reference)
    compiled.featurize_into(data, offsets, CompiledPath(tables(spec)).blob, kernel)
    assert np.array_equal(reference.view(np.uint32), kernel.view(np.uint32))


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
    blob = CompiledPath(tables(default_feature_spec(), forest)).blob
    for block in (rows, rows[:0]):
        scores = np.empty(len(block), dtype=np.int64)
        compiled.score_rows(block, blob, scores)
        assert np.array_equal(scores, score_batch(forest, block))


def test_regions_are_identical(forest_and_rows):
    forest, X = forest_and_rows
    keys = demo_handles(3000) + awkward_keys()
    packed = pack_batch(keys)
    scores = np.sort(score_batch(forest, featurize(keys, default_feature_spec())))
    # boundaries at key scores (ties fall on the upper side), between them, and beyond them all
    for boundaries in ([], [int(scores[len(scores) // 2])], scores[:: len(scores) // 7].tolist(), [scores[-1] + 1]):
        both = tables(default_feature_spec(), forest, boundaries, [Constant(True)] * (len(boundaries) + 1))
        assert np.array_equal(NumpyPath(both).regions(packed), CompiledPath(both).regions(packed))


@pytest.mark.parametrize("bits, probes", [(1, 1), (64, 3), (1000, 7), (1_000_003, 12)])
def test_bloom_answers_are_identical(bits, probes):
    rng = np.random.default_rng(bits)
    bloom = BloomFilter.empty(bits, probes, seed=77)
    members = [bytes(rng.integers(0, 256, 12).astype(np.uint8)) for _ in range(min(bits // 10, 300))]
    bloom.insert(members)
    queries = members + [bytes(rng.integers(0, 256, 9).astype(np.uint8)) for _ in range(3000)]
    hashes = hash_keys(queries, 77)
    # a "no" region first, so the Bloom filter's words do not start the word table
    blob = CompiledPath(tables(default_feature_spec(), regions=[Constant(False), bloom], seed=77)).blob
    answers = np.empty(len(queries), dtype=bool)
    compiled.answer_regions(np.ones(len(queries), dtype=np.int64), hashes.low, hashes.high, blob, answers)
    assert np.array_equal(answers, bloom.query_hashes(hashes)) and answers[: len(members)].all()


@settings(max_examples=40, deadline=None)
@given(st.lists(st.binary(max_size=20), max_size=300), st.lists(st.binary(max_size=20), max_size=300),
       st.integers(1, 32), st.sampled_from([3, 4]), st.integers(0, 2**64 - 1))
def test_fuse_answers_are_identical(members, others, width, arity, seed):
    fuse = build_fuse(hash_keys(members, 77), width, arity, 77, seed)
    hashes = hash_keys(members + others, 77)
    # a Bloom region first, so the fuse filter's words do not start the word table
    bloom = BloomFilter.empty(64, 2, seed=77)
    blob = CompiledPath(tables(default_feature_spec(), regions=[bloom, fuse], seed=77)).blob
    answers = np.empty(len(hashes), dtype=bool)
    compiled.answer_regions(np.ones(len(hashes), dtype=np.int64), hashes.low, hashes.high, blob, answers)
    assert np.array_equal(answers, fuse.query_hashes(hashes)) and answers[: len(members)].all()


def test_loader_answers_are_identical(forest_and_rows, tmp_path):
    from tamis.filters import build_filters
    from tamis.package import package_artifact
    from tamis.query import region_of
    from tamis.regions import RegionSettings, plan_regions

    forest, _ = forest_and_rows
    spec = default_feature_spec()
    rng = np.random.default_rng(3)
    handles = demo_handles(6000)
    members = sorted(set(handles[::2]))
    others = [k for k in handles[1::2] if k not in set(members)]
    member_scores = score_batch(forest, featurize(members, spec))
    plan = plan_regions(member_scores, score_batch(forest, featurize(others, spec)), None, 0.05, RegionSettings(segments=100))
    filters = build_filters(members, region_of(member_scores, plan.boundaries), plan.filters, 99)
    assert {"bloom", "fuse"} & {f.mode for f in filters}
    path = tmp_path / "both.tamis"
    package_artifact(path, feature_spec=spec, forest=forest, boundaries=plan.boundaries, region_filters=filters,
                     hash_seed=99, provenance={"test": "compiled"})
    loaded = open_filter(path)
    queries = members + others + awkward_keys() + [k.decode("latin-1") for k in awkward_keys()]
    rng.shuffle(queries)
    reference, kernels = loaded.using("numpy"), loaded.using("compiled")
    assert np.array_equal(reference.contains_many(queries), kernels.contains_many(queries))
    assert [reference.contains(k) for k in queries] == [kernels.contains(k) for k in queries]
    assert kernels.contains_many(members).all() and all(map(kernels.contains, members))  # no false negatives


def test_the_environment_variable_forces_the_numpy_path():
    code = "from tamis import compiled; print(compiled.ENABLED)"
    for value, expected in (("1", "False"), ("0", "True")):
        env = dict(os.environ, **{compiled.NUMPY_ONLY_VARIABLE: value})
        done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, check=True)
        assert done.stdout.strip() == expected


def test_the_numpy_answer_path_runs_no_kernel(monkeypatch):
    from pathlib import Path

    artifact = Path(__file__).parent / "data" / "format-1.0.tamis"
    loaded = open_filter(artifact)
    keys = [b"%d" % i for i in range(2000)]
    expected = loaded.contains_many(keys)

    def no_kernel(*args):
        raise AssertionError("a compiled kernel ran on the numpy path")

    for name in ("featurize_into", "score_rows", "regions_of_packed", "answer_regions", "contains_one"):
        monkeypatch.setattr(compiled, name, no_kernel)
    for path in ("numpy", "numpy-single"):
        assert loaded.answers_through(path, keys).tolist() == expected.tolist()
    for path in ("compiled", "compiled-single"):
        with pytest.raises(AssertionError, match="compiled kernel ran"):
            loaded.answers_through(path, keys)


def test_the_compiled_path_holds_each_filter_word_once():
    # format-2.0.tamis holds Bloom regions and a binary fuse region. On the compiled path the regions'
    # words are views of the kernels' tables: one copy in memory, and none of the file's bytes kept
    # (benchmarks/open_cost.py measures the resident memory this gives).
    from pathlib import Path

    loaded = open_filter(Path(__file__).parent / "data" / "format-2.0.tamis", answer_path="compiled")
    blob = loaded.tables.kernel_tables
    filters = [region for region in loaded.tables.regions if not isinstance(region, Constant)]
    assert {type(region).__name__ for region in filters} == {"BloomFilter", "FuseFilter"}
    for region in filters:
        assert region.words.base is not None and np.shares_memory(region.words, blob)
        assert not region.words.flags.writeable
    # switching path keeps the one copy, and both paths still answer alike
    reference = loaded.using("numpy")
    assert reference.tables is loaded.tables
    keys = [b"%d" % i for i in range(3000)] + awkward_keys()
    assert np.array_equal(reference.contains_many(keys), loaded.contains_many(keys))
