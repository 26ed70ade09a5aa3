"""The format-1.0 reference artifact and its test vectors (tests/make_vectors.py wrote both).

`tests/data/format-1.0.tamis` was written by the format-1.0 writer and is never rewritten: every
later loader must open it and answer every vector's key exactly as recorded, on every answer path.
Each step of the query path is also checked on its own against the vectors (features, score,
region, hash, probes), as a reader in another language would check itself (FORMAT.md).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from tamis.bloom import hash_keys, probe_positions
from tamis.features import featurize
from tamis.loader import open_filter
from tamis.query import ANSWER_PATHS, available_paths, region_of
from tamis.trees import score_batch

DATA = Path(__file__).resolve().parent / "data"
ARTIFACT = DATA / "format-1.0.tamis"
VECTORS = json.loads((DATA / "format-1.0.vectors.json").read_text(encoding="utf-8"))["vectors"]
KEYS = [bytes.fromhex(v["key_hex"]) for v in VECTORS]
ANSWERS = [v["answer"] for v in VECTORS]


@pytest.fixture(scope="module")
def reference():
    return open_filter(ARTIFACT)


def test_the_vectors_cover_every_region_mode_and_both_answers(reference):
    modes = {reference.info["regions"][v["region"]]["mode"] for v in VECTORS}
    assert modes == {"no", "bloom", "yes"} and set(ANSWERS) == {True, False}
    assert any(v["key_text"] is None for v in VECTORS) and any(not v["key_text"].isascii() for v in VECTORS if v["key_text"])


@pytest.mark.parametrize("answer_path", ANSWER_PATHS)
def test_the_reference_artifact_answers_as_recorded_on_every_path(reference, answer_path):
    if answer_path not in available_paths():
        pytest.skip("numba is not installed or is disabled")
    on_path = reference.using(answer_path)
    assert on_path.contains_many(KEYS).tolist() == ANSWERS
    assert [on_path.contains(key) for key in KEYS] == ANSWERS
    texts = [v["key_text"] for v in VECTORS if v["key_text"] is not None]
    assert on_path.contains_many(texts).tolist() == [v["answer"] for v in VECTORS if v["key_text"] is not None]
    assert [on_path.contains(text) for text in texts] == [v["answer"] for v in VECTORS if v["key_text"] is not None]


def test_each_step_matches_the_vectors(reference):
    features = featurize(KEYS, reference.feature_spec)
    expected = np.array([[int(h, 16) for h in v["features_f32_hex"]] for v in VECTORS], dtype=np.uint32)
    assert np.array_equal(features.view(np.uint32), expected)
    scores = score_batch(reference.forest, features)
    assert scores.tolist() == [v["score"] for v in VECTORS]
    regions = region_of(scores, reference.boundaries)
    assert regions.tolist() == [v["region"] for v in VECTORS]
    hashes = hash_keys(KEYS, reference.hash_seed)
    assert hashes.low.tolist() == [v["hash_low"] for v in VECTORS]
    assert hashes.high.tolist() == [v["hash_high"] for v in VECTORS]
    for v, key in zip(VECTORS, KEYS):
        entry = reference.info["regions"][v["region"]]
        if entry["mode"] == "bloom":
            positions = probe_positions(hash_keys([key], reference.hash_seed), entry["bits"], entry["hashes"])[:, 0]
            assert positions.tolist() == v["probes"]
