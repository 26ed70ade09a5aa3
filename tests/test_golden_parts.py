"""Golden bytes per component, none of which depends on a trained model (so on no LightGBM version):
the features of fixed keys, a hand-written forest's scores, a Bloom filter and a binary fuse filter
of fixed keys, and a whole artifact packaged from those parts (container, header and sections).

Each digest was recorded once from this code (xxh3-64); a failure means the bytes changed for the
same inputs. When the change is deliberate, bump FEATURES_VERSION, FORMAT_MINOR or FORMAT_MAJOR
(pipeline/format.py) as the change requires, and record the new digest here with the reason.
"""

from __future__ import annotations

import numpy as np
import pytest
import xxhash

from tamis.bloom import BloomFilter, hash_keys
from tamis.budgets import FilterChoice
from tamis.features import default_feature_spec, feature_count, featurize
from tamis.filters import build_filters
from tamis.fuse import build_fuse
from tamis.loader import open_filter
from tamis.package import package_artifact
from tamis.query import region_of
from tamis.trees import Forest, score_batch

HASH_SEED = 0x7A315
# Emberfall handles of every shape the features look at: letters, digits, runs, case, separators,
# non-ASCII, a NUL byte, one byte, and one of 255 bytes.
KEYS = ([b"frost_wyrm_%04d" % i for i in range(1500)] + [b"Ashen%dVale" % (i * 7) for i in range(1500)]
        + ["h\u00e9ros_%d" % i for i in range(500)] + [b"x", b"\x00ember", b"9" * 255])
KEYS = [k.encode() if isinstance(k, str) else k for k in KEYS]
PROVENANCE = {"built_at": "2026-12-01T00:00:00Z", "tool": "tamis golden parts"}

# Recorded with this code (format 2.2, FEATURES_VERSION 1).
GOLDEN = {
    "features": "5e7e89fae4025d25",
    "scores": "61e3b6527942a02b",
    "bloom": "e296b7eb18e45d45",
    "fuse": "a3c6c1543872fc58/seed 0",
    "artifact": "ccd29d7b3cf87181",
}


def digest(data: bytes | np.ndarray) -> str:
    return xxhash.xxh3_64_hexdigest(data.tobytes() if isinstance(data, np.ndarray) else data)


def hand_forest(features: int) -> Forest:
    """Three trees written by hand over the default features: length (column 0), the count of
    class 2, digits (column 3), and the first bigram bucket column."""
    return Forest(
        features=features, scale=16, bias=-40,
        tree_splits=np.array([2, 1, 1], np.uint8),
        feature=np.array([0, 3, 3, 25], np.uint8),
        threshold=np.array([9.5, 2.5, 0.5, 0.5], np.float32),
        left=np.array([-1, -2, -1, -1], np.int8),
        right=np.array([1, -3, -2, -2], np.int8),
        value=np.array([-12, 20, 35, -8, 9, 0, 4], np.int16),
    )


@pytest.fixture(scope="module")
def parts() -> dict:
    spec = default_feature_spec()
    X = featurize(KEYS, spec)
    forest = hand_forest(feature_count(spec))
    scores = score_batch(forest, X)
    bloom = BloomFilter.empty(40_000, 5, HASH_SEED)
    bloom.insert(KEYS)
    fuse = build_fuse(hash_keys(KEYS, HASH_SEED), 8, 4, HASH_SEED)
    return {"spec": spec, "X": X, "forest": forest, "scores": scores, "bloom": bloom, "fuse": fuse}


def test_the_features_of_fixed_keys(parts):
    assert digest(parts["X"]) == GOLDEN["features"]


def test_a_hand_written_forest_scores_fixed_keys(parts):
    assert len(set(parts["scores"].tolist())) >= 4  # the trees split these keys several ways
    assert digest(parts["scores"].astype("<i8")) == GOLDEN["scores"]


def test_a_bloom_filter_of_fixed_keys(parts):
    assert parts["bloom"].query(KEYS).all()
    assert digest(parts["bloom"].words.astype("<u8")) == GOLDEN["bloom"]


def test_a_binary_fuse_filter_of_fixed_keys(parts):
    fuse = parts["fuse"]
    assert fuse is not None and fuse.query(KEYS).all()
    assert digest(fuse.words.astype("<u8")) + f"/seed {fuse.seed}" == GOLDEN["fuse"]


def test_an_artifact_of_fixed_parts(parts, tmp_path):
    # three regions by the hand forest's score: no members below -30, a Bloom region, a fuse region
    boundaries = [-30, 0]
    regions = region_of(parts["scores"], boundaries)
    choices = [FilterChoice("no", 0.0), FilterChoice("bloom", 0.02), FilterChoice("fuse", 2.0**-8, arity=4, width=8)]
    members = [k for k, r in zip(KEYS, regions.tolist()) if r > 0]
    filters = build_filters(members, regions[regions > 0], choices, HASH_SEED)
    assert [f.mode for f in filters] == ["no", "bloom", "fuse"]
    path = tmp_path / "parts.tamis"
    package_artifact(path, feature_spec=parts["spec"], forest=parts["forest"], boundaries=boundaries,
                     region_filters=filters, hash_seed=HASH_SEED, provenance=PROVENANCE,
                     measured={"fpr": 0.01}, verified_paths=("numpy",))
    loaded = open_filter(path, answer_path="numpy")
    assert loaded.contains_many(members).all() and loaded.verified_paths == ("numpy",)
    assert digest(path.read_bytes()) == GOLDEN["artifact"]
